"""The audit log: write and rotate, read, verify; its index (SQLite, derived from the log) and its checkpoints."""
