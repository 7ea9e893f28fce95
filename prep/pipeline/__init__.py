"""One record through every stage (record: beats_of_record, record_result, RecordResult), and
long records in overlapping chunks (chunks)."""
