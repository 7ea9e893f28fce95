"""One record through every stage (record: process_record, safe_process, RecordResult), and
long records in overlapping chunks (chunks)."""
