"""The engine's log: JSON lines for machines, a readable console for people.

A service manager or log shipper reads standard output line by line, so when
it is not a terminal every event is one JSON object on one line. On a terminal
the same events are rendered for reading. The daemon writes one line per order
(file, order id, outcome, milliseconds) and a few lines at start and stop;
nothing per stage — the audit log is the place for an order's details.
"""
from __future__ import annotations

import logging
import sys
from typing import IO

import orjson
import structlog


def configure_logging(stream: IO[str] | None = None, *, console: bool | None = None):
    """Set up structlog for the process and return the engine's logger (lines from level info up).

    Parameters
    ----------
    stream : text stream, optional
        Where the lines go; standard output by default.
    console : bool, optional
        Force the console renderer (``True``) or JSON lines (``False``); by
        default the console renderer is used only when ``stream`` is a terminal.
    """
    stream = sys.stdout if stream is None else stream
    if console is None:
        console = _is_terminal(stream)
    shared = [
        structlog.contextvars.merge_contextvars,
        structlog.processors.add_log_level,
        structlog.processors.TimeStamper(fmt="iso", utc=True),
    ]
    if console:
        processors = [*shared, structlog.dev.ConsoleRenderer(colors=True)]
    else:
        processors = [*shared, structlog.processors.dict_tracebacks,
                      structlog.processors.JSONRenderer(serializer=_json_line)]
    structlog.configure(
        processors=processors,
        wrapper_class=structlog.make_filtering_bound_logger(logging.INFO),
        logger_factory=structlog.PrintLoggerFactory(stream),
        # Not cached, so structlog.testing.capture_logs() sees every line in tests.
        cache_logger_on_first_use=False,
    )
    return get_logger()


def _json_line(event: dict, default=None, **_: object) -> str:
    """One event as JSON (orjson: the daemon writes a line per order, so the encoder's speed shows)."""
    return orjson.dumps(event, default=default).decode()


def get_logger():
    return structlog.get_logger("lenslane")


def _is_terminal(stream: IO[str]) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False
