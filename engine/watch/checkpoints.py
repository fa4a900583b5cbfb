"""The audit log's checkpoint line in the engine's own log: at start, every ``audit.checkpoint_minutes``, at stop.

journald keeps copies the lab folder's writer cannot reach; ``lenslane audit
verify --checkpoints`` checks the log against them (:mod:`lenslane.audit.checkpoint`).
"""
from __future__ import annotations

import math
import time
from typing import Any

from lenslane.audit.checkpoint import load_signing_key, make_checkpoint
from lenslane.config import ConfigError


class Checkpoints:
    """When the next checkpoint is due, and logging one (signed when the lab has a signing key)."""

    def __init__(self, lab: Any, log: Any):
        self.lab = lab
        self.log = log
        self.seconds = lab.config.audit.checkpoint_minutes * 60
        self.next_due = math.inf  # none before start()
        self.key: Any = None

    def start(self) -> None:
        """Load the signing key (a bad one is a configuration error) and log the first checkpoint."""
        self.key = load_signing_key(self.lab.root, self.lab.config.audit.signing_key)
        self.log_one()

    def use(self, config: Any) -> None:
        """A reloaded configuration: its interval and key from the next checkpoint on."""
        self.seconds = config.audit.checkpoint_minutes * 60
        try:
            self.key = load_signing_key(self.lab.root, config.audit.signing_key)
        except ConfigError as exc:
            self.log.error("checkpoint key refused", error=str(exc),
                           message="the checkpoints go on signed with the key in force before the reload")
        self.next_due = min(self.next_due, time.monotonic() + self.seconds)

    def log_one(self) -> None:
        """Log the checkpoint line of the log as it is now."""
        self.next_due = time.monotonic() + self.seconds
        if self.lab.audit is None:
            return
        try:
            self.log.info("checkpoint", **make_checkpoint(self.lab.audit.index, self.key))
        except Exception as exc:  # the checkpoint is a copy for later checks; the orders go on
            self.log.warning("checkpoint failed", error=f"{type(exc).__name__}: {exc}")
