"""What the running engine does for people between orders: apply their decisions, reload their config.

``lenslane watch`` holds the lab's lock, so it is the one that applies the
decision requests waiting in ``decisions/``: when ``lenslane decide`` wakes it
(SIGUSR1) and at every rescan in case a wake was missed. The daemon calls
:meth:`Desk.run` between orders, after its group commit, so a decision's
records never fall inside a batch.

SIGHUP asks for the configuration to be reloaded. The file is validated first,
all of it, stage parameters included (the same checks as at start); a bad file
is refused with the key path and the configuration in force is kept. While the
file on disk differs from the configuration in force (edited and not reloaded,
or refused), a warning is logged at once and then every few minutes.
"""
from __future__ import annotations

from typing import Any, Callable

from lenslane.audit.log import AuditError
from lenslane.chain.host import start_host
from lenslane.config import CONFIG_NAME, ConfigError, LabConfig, load_config
from lenslane.decide.apply import Applier
from lenslane.decide.model import DecisionError
from lenslane.lab.folder import Interrupted, Lab

#: How often the warning about a config file that differs from the one in force is repeated (s).
DRIFT_WARN_SECONDS = 300.0


class Desk:
    """Decisions and config reloads for a daemon; ``on_config`` is told each configuration put in force."""

    def __init__(self, lab: Lab, log: Any, on_config: Callable[[LabConfig], None] = lambda config: None):
        self.lab = lab
        self.log = log
        self.on_config = on_config
        self.woken = True  # look once at start: requests left by a crash or made while no engine ran
        self.reload_asked = False
        self.next_check = 0.0
        self.drift: str | None = None  # why the file on disk differs from the config in force
        self.next_drift_warning = 0.0

    # Both are called from signal handlers: they only set a flag.
    def wake(self) -> None:
        self.woken = True

    def ask_reload(self) -> None:
        self.reload_asked = True

    def due(self, now: float) -> bool:
        return self.woken or self.reload_asked or now >= self.next_check

    def next_due(self) -> float:
        return 0.0 if self.woken or self.reload_asked else self.next_check

    def run(self, now: float) -> None:
        """Reload if asked, warn about a config file that differs, apply the waiting decisions."""
        self.next_check = now + self.lab.config.watch.rescan_seconds
        if self.reload_asked:
            self.reload_asked = False
            self.reload()
        self._check_drift(now)
        self.woken = False
        try:
            done = Applier(self.lab).run_pending()
        except (OSError, AuditError) as exc:  # a full disk…: what was taken stays taken, retried at the next check
            self.log.error("decision blocked", error=str(exc),
                           message="cannot write a decision; it is applied once or not at all, and retried")
            return
        except Interrupted:  # a stop while a replace ran the chain: nothing recorded, finished at the next start
            self.log.warning("interrupted", message="a decision's chain was still running at shutdown; it stays in "
                                                    "decisions/ and is applied at the next start")
            return
        for request, outcome in done:
            fields = {k: request.get(k) for k in ("order_id", "action", "by", "request")} if request else {}
            if isinstance(outcome, DecisionError):
                self.log.warning("decision refused", **fields, exit_code=outcome.exit_code, message=outcome.message)
            else:
                self.log.info("decision", **fields, seq=outcome.seq, message=outcome.message)

    def reload(self) -> bool:
        """Put the config file on disk in force, if it is valid; else keep the one in force."""
        path = self.lab.root / CONFIG_NAME
        old = self.lab.host.config_sha256
        try:
            config = load_config(self.lab.root)
            host = start_host(config)
        except (ConfigError, OSError, UnicodeDecodeError) as exc:
            self.log.error("config refused", path=str(path), error=str(exc),
                           message="the configuration file is not valid; the configuration in force is kept")
            return False
        self.lab.use_host(host)
        self.on_config(config)
        self.drift = None
        self.log.info("config reloaded", path=str(path), old_config_sha256=old, config_sha256=host.config_sha256,
                      stages=[link.stage.name for link in host.chain], disabled=host.disabled)
        return True

    def _check_drift(self, now: float) -> None:
        path = self.lab.root / CONFIG_NAME
        try:
            edited = load_config(self.lab.root) != self.lab.config
            drift = "it was edited since the configuration in force was loaded" if edited else None
        except (ConfigError, OSError, UnicodeDecodeError) as exc:
            drift = f"it is not valid ({exc})"
        if drift is None:
            self.drift = None
            return
        if drift != self.drift or now >= self.next_drift_warning:
            self.drift = drift
            self.next_drift_warning = now + DRIFT_WARN_SECONDS
            self.log.warning("config differs", path=str(path), config_sha256=self.lab.host.config_sha256,
                             message=f"the configuration file on disk differs from the one in force: {drift}; "
                                     "the engine keeps working with the one in force; SIGHUP reloads it, after validating it")
