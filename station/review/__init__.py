"""Reading datalogs after the fact: load, summary, capability, re-binning, limit tools, report, plots."""
