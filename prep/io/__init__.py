"""Reading inputs: the format registry and record discovery (sources), one module per format
(wfdb, edf, csv), what readers share (_files)."""
