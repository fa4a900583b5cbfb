"""The audit log: write and rotate, read, verify."""
