"""One record through every stage (record: beats_of_record, record_result; result:
RecordResult; rr and signals: its helpers) and long records in overlapping chunks (chunks)."""
