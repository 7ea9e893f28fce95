"""Many records -> one dataset folder: the run and consolidation (run), per-record shards
(shards), atomic writers and the manifest (export), patient-wise splits (split), verification
(check), and the read-only view of a finished run (view)."""
