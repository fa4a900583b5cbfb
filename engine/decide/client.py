"""``lenslane decide``: drop a request and wait for the lab's one writer to answer it.

If no process holds the lab's lock, this process takes it and applies the
waiting requests itself (its own among them), exactly as the engine would; if
the engine holds it, the engine is woken (SIGUSR1) and applies them between
orders. A request no one took in time is withdrawn (removed before anyone
took it), so the person is told plainly that nothing was decided.
"""
from __future__ import annotations

import contextlib
import os
import signal
import threading
import time
from pathlib import Path

from lenslane.audit.log import AuditError
from lenslane.config import ConfigError
from lenslane.decide import requests
from lenslane.decide.model import EXIT_BLOCKED, EXIT_NOT_TAKEN, EXIT_USAGE, DecisionError, DecisionResult
from lenslane.lab.files import LabLocked, NotALabFolder, lock_lab, read_lock, require_lab

#: How long to wait for a running engine to answer (s); it normally answers in milliseconds.
WAIT_SECONDS = 30.0
POLL_SECONDS = 0.02
#: How often a running engine is woken again while the request waits (s).
WAKE_SECONDS = 1.0
#: How long to wait for the answer once the engine has taken the request (s).
TAKEN_WAIT_SECONDS = 300.0


def decide(lab_root: Path, order_id: str, action: str, by: str, note: str, held_file: str | None = None,
           wait_seconds: float = WAIT_SECONDS) -> DecisionResult:
    """Apply one person's decision on an order, exactly once.

    Raises
    ------
    DecisionError
        Not applied; ``message`` says why and ``exit_code`` which case it is.
    """
    root = Path(lab_root)
    try:
        require_lab(root)
    except NotALabFolder as exc:
        raise DecisionError(str(exc), EXIT_USAGE) from None
    request = requests.new_request(order_id, action, by, note, held_file)
    try:
        path = requests.write_request(root, request)
    except OSError as exc:
        raise DecisionError(f"cannot write the request in {requests.folder(root)}: {exc}; nothing was decided",
                            EXIT_BLOCKED) from exc
    deadline = time.monotonic() + wait_seconds
    taken_deadline = None
    next_wake = 0.0
    while True:
        answer = requests.read_answer(path)
        if answer is not None:
            if isinstance(answer, DecisionError):
                raise answer
            return answer
        try:
            holder = _apply_if_free(root)
        except ConfigError as exc:  # nothing took the request: withdrawn, lest a later engine apply it unasked
            path.unlink(missing_ok=True)
            raise DecisionError(f"cannot load the lab's config and plugins: {exc}; nothing was decided",
                                EXIT_USAGE) from None
        now = time.monotonic()
        if holder is not None and now >= next_wake:
            _wake(root)
            next_wake = now + WAKE_SECONDS
        if now > deadline and taken_deadline is None:
            try:
                path.unlink()  # withdrawn before the engine took it: nothing was decided
            except FileNotFoundError:
                taken_deadline = now + TAKEN_WAIT_SECONDS  # taken: it is being applied, wait for the answer
            else:
                raise DecisionError(f"the engine running on {root} (pid {holder or 'unknown'}) did not take the "
                                    f"decision within {wait_seconds:g} s; it was withdrawn and nothing was decided",
                                    EXIT_NOT_TAKEN)
        if taken_deadline is not None and now > taken_deadline:
            raise DecisionError(f"the engine took the decision but has not answered; it is applied once or not at "
                                f"all — see `lenslane queue {root}` and `lenslane explain {root} {order_id}`",
                                EXIT_NOT_TAKEN)
        time.sleep(POLL_SECONDS)


def _apply_if_free(root: Path) -> str | None:
    """Apply the waiting requests if no one holds the lab's lock; else return the holder's pid."""
    try:
        lock = lock_lab(root)
    except LabLocked as exc:
        return exc.holder
    except OSError as exc:
        raise _blocked(root, exc) from exc
    lab = None
    try:
        from lenslane.chain.host import start_host
        from lenslane.config import load_config
        from lenslane.decide.apply import Applier
        from lenslane.lab.folder import Lab

        if requests.pending(root):
            lab = Lab(root, start_host(load_config(root)))
            lab.recover()  # as any holder of the lock does first: the log's tail, temp leftovers
            with _time_limit(lab):
                Applier(lab).run_pending()
    except (OSError, AuditError) as exc:
        raise _blocked(root, exc) from exc
    finally:
        if lab is not None and lab.audit is not None:
            lab.audit.close()  # its index: a web page applies decisions in one long-running process
        os.close(lock)
    return None


def _blocked(root: Path, exc: Exception) -> DecisionError:
    return DecisionError(f"cannot write in {root}: {exc}; the decision is applied once or not at all — it stays in "
                         "decisions/ and is applied by the next lenslane watch or decide", EXIT_BLOCKED)


@contextlib.contextmanager
def _time_limit(lab):
    """A replace runs the chain: bound it by ``watch.order_time_limit_seconds`` as the engine does.

    The limit rides on SIGALRM, which only the main thread can receive; called from another thread (a web
    server's worker) the chain runs unbounded, as a preview does.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    from lenslane.watch.clock import StageClock, signals_handled

    clock = StageClock(lab.config.watch.order_time_limit_seconds)
    lab.time_limit = clock
    with signals_handled({signal.SIGALRM: clock.on_alarm}):
        yield


def _wake(root: Path) -> None:
    """Wake the engine that holds the lab's lock (SIGUSR1), and only an engine: another ``lenslane decide`` or a web
    page applying a decision holds it for a moment too, and has no handler for SIGUSR1, which would end it."""
    pid, state, _ = read_lock(root)
    if pid is None or not (state or {}).get("mode"):  # an engine's state line names its mode
        return
    try:
        os.kill(pid, signal.SIGUSR1)
    except (ProcessLookupError, PermissionError):
        pass  # the engine looks at decisions/ at every rescan anyway
