"""The audit log's public names, in one place.

The log is written by :mod:`lenslane.audit.writer`, read by
:mod:`lenslane.audit.reader`, indexed by :mod:`lenslane.audit.index`, checked by
:mod:`lenslane.audit.verify` and pinned by :mod:`lenslane.audit.checkpoint`;
what a record is lives in :mod:`lenslane.audit.records`.
"""
from lenslane.audit.index import INDEX_NAME, Index
from lenslane.audit.reader import Line, audit_files, iter_lines, iter_records, parse_record, rotated_name
from lenslane.audit.records import AUDIT_NAME, DEFINE_EVENT, GENESIS, TORN_EVENT, canonical, record_hash, unpack
from lenslane.audit.verify import Finding, VerifyReport, verify
from lenslane.audit.writer import AuditError, AuditLog
from lenslane.vocabulary import OUTCOMES  # the events that end a pass, which the log records

__all__ = [
    "AUDIT_NAME", "DEFINE_EVENT", "GENESIS", "INDEX_NAME", "OUTCOMES", "TORN_EVENT", "AuditError", "AuditLog",
    "Finding", "Index", "Line", "VerifyReport", "audit_files", "canonical", "iter_lines", "iter_records",
    "parse_record", "record_hash", "rotated_name", "unpack", "verify",
]
