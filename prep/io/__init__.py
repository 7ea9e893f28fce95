"""Reading inputs: finding records, WFDB, CSV and annotation CSV (read), EDF/EDF+ (edf)."""
