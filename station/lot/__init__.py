"""Running a lot: the bench and its safe state, the lot loop, one handler index, site readings, settling, stops."""
