"""Everything read before the first part: config files, quantities, bench config, sequence, limit tables, the plan."""
