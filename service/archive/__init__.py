"""The archive: records, keys, idempotency, database engines and the hash chain."""
