"""Compute ahead on the second core while the engine does the file-system work of a backlog.

A backlog is drained one order at a time, and each order costs the engine's
process its chain (CPU) and its durable writes. A second process, forked from
the engine after start-up (so it has the same plugins and config), reads the
orders waiting in the inbox, runs the chain and hands back each result keyed by
the sha256 of the input's bytes. When the engine reaches an order whose bytes
have a result ready, it takes that result; otherwise it runs the chain itself.
The helper is given the backlog a chunk at a time and works through each chunk
from its last order back while the engine works on from its first, so the two
meet wherever their speeds put them: the work is shared fairly however fast the
disk and the chain are, with no ratio to tune.

Nothing about the promise changes: the helper writes no file and never claims
an order; the engine validates, claims, checks for duplicates, publishes,
records and archives exactly as without it. Processing is deterministic for the
same bytes and config, so a result computed ahead is the result the engine
would compute. Whatever the helper cannot do — a file that does not parse, a
stage that fails or runs long, a helper that died — the engine simply does
itself, with its own time limit and error handling.

The helper also validates the order, encodes the result and encodes its
change and flag events for the audit log (:class:`engine.audit.EncodedEvent`,
the very bytes the engine would write): the engine is left with the chaining,
the hashing and the file-system work.
"""
from __future__ import annotations

import fcntl
import hashlib
import multiprocessing
import os
import pickle
import signal
from collections import OrderedDict
from dataclasses import dataclass
from typing import Any

from engine.audit import canonical, encode_event
from engine.fsio import open_regular, read_exactly
from engine.inbox import order_events, result_bytes
from engine.intake import OrderRejected, read_order

#: Results kept waiting for the engine (bytes of ~20 kB each): bounds memory in any backlog.
CACHE_LIMIT = 256
#: Names sent to the helper in one message; it gets the next when it is idle, so it never runs more than
#: about CACHE_LIMIT orders ahead.
CHUNK = 64
#: What the results pipe is asked to hold (see _widen).
PIPE_BYTES = 1 << 20
#: Names already sent are remembered to be sent once; past this many the memory is started afresh.
SENT_LIMIT = 8192
_IDLE = b"idle"


@dataclass(frozen=True)
class Ahead:
    """What the helper hands over for one input: all the engine still needs to publish and record it."""

    data: bytes  # the result, exactly as published
    summary: dict[str, Any]  # its order_id, status and lenses
    timings: dict[str, float]
    content_sha256: str  # of the parsed order, as the engine's duplicate check takes it
    events: list[tuple[bytes, bytes, bytes, bytes]]  # its change and flag events: EncodedEvent's four parts


class _TimeUp(BaseException):
    """A stage ran past the limit in the helper; the engine will run the order itself."""


def _on_alarm(signum: int, frame: Any) -> None:
    raise _TimeUp


def _helper(names_in, results_out, engine_ends, inbox: str, max_bytes: int, limit_seconds: float, pipeline,
            materials, close_fds: tuple[int, ...]) -> None:
    """The helper process: compute what it is asked, send each result, exit when the engine is gone."""
    # The engine's ends of the pipes came with the fork: without closing them here, the helper would never
    # see the engine go (a kill -9 included) and would outlive it.
    for end in engine_ends:
        end.close()
    for fd in close_fds:  # the lab's lock, above all: only the engine may hold it
        try:
            os.close(fd)
        except OSError:
            pass
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the engine handles stops; SIGTERM ends the helper
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    signal.signal(signal.SIGALRM, _on_alarm)
    while True:
        try:
            names = names_in.recv()
        except (EOFError, OSError):
            return
        for name in names:
            try:
                fd, opened = open_regular(f"{inbox}/{name}")
            except Exception:  # taken by the engine meanwhile, or not a plain file: the engine judges it
                continue
            try:
                if opened.st_size > max_bytes:
                    continue
                raw = read_exactly(fd, opened.st_size)
            except OSError:
                continue
            finally:
                os.close(fd)
            try:
                order, parsed = read_order(raw, materials)
            except OrderRejected:
                continue
            signal.setitimer(signal.ITIMER_REAL, limit_seconds)
            try:
                outcome = pipeline.run(order, parsed)
            except BaseException:  # a failing or hanging stage: the engine will meet it itself
                continue
            finally:
                signal.setitimer(signal.ITIMER_REAL, 0)
            result = outcome.result
            # Plain tuples, bytes and dicts: pickled by the C pickler alone, several times faster than objects.
            message = (hashlib.sha256(raw).hexdigest(), result_bytes(result),
                       {"order_id": result["order_id"], "status": result["status"], "lenses": result["lenses"]},
                       outcome.timings, hashlib.sha256(canonical(parsed)).hexdigest(),
                       [tuple(encode_event(event)) for event in order_events(result)])
            try:
                results_out.send_bytes(pickle.dumps(message, pickle.HIGHEST_PROTOCOL))
            except (OSError, ValueError):
                return  # the engine is gone
        try:
            results_out.send_bytes(_IDLE)
        except (OSError, ValueError):
            return


def _widen(connection) -> None:
    """Let the results pipe hold some thirty results (1 MiB, the usual most a user may ask for).

    The engine reads results between orders; with the default 64 KiB (two or
    three results) the helper would wait on a full pipe whenever the engine
    spends a while on an order of its own, and the second core would idle.
    """
    try:
        fcntl.fcntl(connection.fileno(), fcntl.F_SETPIPE_SZ, PIPE_BYTES)
    except (AttributeError, OSError):  # not Linux, or a lower limit for this user: the default will do
        pass


class Prefetcher:
    """The engine's side: send names ahead, take results by the sha256 of an input's bytes."""

    def __init__(self, lab, close_fds: tuple[int, ...] = ()):
        context = multiprocessing.get_context("fork")
        names_in, self.names_out = context.Pipe(duplex=False)
        self.results_in, results_out = context.Pipe(duplex=False)
        _widen(results_out)
        watch = lab.config.watch
        self.process = context.Process(
            target=_helper, name="lenslane-prefetch", daemon=True,
            args=(names_in, results_out, (self.names_out, self.results_in), os.fspath(lab.inbox), watch.max_order_bytes,
                  watch.order_time_limit_seconds, lab.pipeline, lab.host.settings.materials, close_fds))
        self.process.start()
        names_in.close()
        results_out.close()
        self.ready: OrderedDict[str, Ahead] = OrderedDict()
        self.waiting: list[str] = []  # names not yet sent
        self.sent: set[str] = set()
        self.missed: set[str] = set()  # digests the engine looked for before their result came
        self.busy = False
        self.hits = 0

    @staticmethod
    def wanted(lab) -> bool:
        """Computing ahead is exact only when nothing observes the chain's calls in this process."""
        host = lab.host
        return (not host.hook.lenslane_result_ready.get_hookimpls()
                and not host.config.engine.trace_hooks and (os.cpu_count() or 1) > 1)

    def ahead(self, names: list[str]) -> None:
        """The names the engine will take next, in its order; they replace any not yet sent."""
        if len(self.sent) > SENT_LIMIT:
            self.sent.clear()
        self.waiting = [name for name in names if name not in self.sent]
        self._feed()

    def take(self, raw_sha256: str) -> Ahead | None:
        """What was computed ahead for these bytes, or None (the engine then validates and runs the chain)."""
        self._collect()
        found = self.ready.pop(raw_sha256, None)
        if found is not None:
            self.hits += 1
        elif len(self.missed) < SENT_LIMIT:
            self.missed.add(raw_sha256)  # the engine computes it itself: a late result is dropped on arrival
        return found

    def _collect(self) -> None:
        try:
            while self.results_in.poll():
                message = self.results_in.recv_bytes()
                if message == _IDLE:  # never a pickle, which starts with its protocol byte
                    self.busy = False
                    continue
                sha256, data, summary, timings, content_sha256, events = pickle.loads(message)
                ahead = Ahead(data, summary, timings, content_sha256, events)
                if sha256 in self.missed:
                    self.missed.discard(sha256)
                    continue
                self.ready[sha256] = ahead
                if len(self.ready) > CACHE_LIMIT:
                    self.ready.popitem(last=False)
        except (EOFError, OSError):
            self.busy = True  # the helper is gone: send nothing more
            self.waiting = []
        self._feed()

    def _feed(self) -> None:
        # One message at a time, and only to an idle helper: neither side ever blocks on a full pipe.
        if self.busy or not self.waiting or len(self.ready) > CACHE_LIMIT - 2 * CHUNK:
            return
        if not self.process.is_alive():
            self.waiting = []
            return
        chunk, self.waiting = self.waiting[:CHUNK], self.waiting[CHUNK:]
        self.sent.update(chunk)
        try:
            # Last name first: the helper works back from the end of the chunk while the engine works on from
            # its start, computing what is not ready yet. They meet wherever their speeds put them, so the two
            # cores share a backlog's work in whatever proportion the disk and the chain make fair, and an
            # order is computed twice at most once a chunk (where they meet). The helper skips orders the
            # engine has taken (gone from the inbox).
            self.names_out.send(chunk[::-1])
            self.busy = True
        except (OSError, ValueError):
            self.waiting = []

    def close(self) -> None:
        for end in (self.names_out, self.results_in):
            try:
                end.close()
            except OSError:
                pass
        self.process.join(timeout=1.0)
        if self.process.is_alive():
            self.process.terminate()
            self.process.join(timeout=1.0)
