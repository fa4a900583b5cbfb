"""Reading one order: its bytes parsed and validated, with what a file that is not an order is."""
from __future__ import annotations

import errno
import hashlib
import os
import stat
from dataclasses import dataclass
from typing import Any

from lenslane.audit.log import canonical
from lenslane.contract.intake import OrderRejected, parse_json, read_order
from lenslane.contract.models import ORDER_ID_RE, LensOrder
from lenslane.lab.files import NotRegular, entry_kind, open_regular, read_exactly

#: Errors opening an input that are the file's own (its permissions): the order is rejected. Any other
#: error (out of file descriptors, an I/O error) is the machine's: the read is retried.
UNREADABLE = frozenset({errno.EACCES, errno.EPERM})


@dataclass
class Examined:
    """What the bytes of one entry are: an order (with its digests) or the problems that refuse it."""

    size: int | None
    sha256: str | None
    order: LensOrder | None = None
    parsed: dict[str, Any] | None = None
    content_sha256: str | None = None
    problems: list[dict[str, str]] | None = None
    maybe_incomplete: bool = False
    kind: str | None = None  # what a non-regular entry is
    order_id: str | None = None


def examine(raw: bytes, materials: Any) -> Examined:
    """Parse and validate the bytes of one order (no file is touched)."""
    sha256 = hashlib.sha256(raw).hexdigest()
    try:
        order, parsed = read_order(raw, materials)
    except OrderRejected as exc:
        readable = _readable(raw)
        order_id = readable.get("order_id") if readable is not None else None
        return Examined(len(raw), sha256, parsed=readable, problems=exc.problems, maybe_incomplete=exc.maybe_incomplete,
                        order_id=order_id if isinstance(order_id, str) and ORDER_ID_RE.match(order_id) else None)
    content = hashlib.sha256(canonical(parsed)).hexdigest()
    return Examined(len(raw), sha256, order, parsed, content, order_id=order.order_id)


def _readable(raw: bytes) -> dict[str, Any] | None:
    """What can be read of a refused order (its id, who sent it), for the audit log; ``None`` when nothing."""
    try:
        data = parse_json(raw)
    except Exception:
        return None
    return data if isinstance(data, dict) else None


def not_a_file(kind: str) -> Examined:
    return Examined(None, None, kind=kind, problems=[{"field": "(file)", "message": (
        f"is a {kind}, not a plain file: moved aside without being followed or opened")}])


def examine_claimed(path: str, info: os.stat_result, max_bytes: int, materials: Any) -> Examined:
    """Read and examine a claimed entry; an entry that is not a plain file is never opened in a way that blocks.

    Raises
    ------
    OSError
        The machine's error (not the order's): the read may succeed later.
    """
    if not stat.S_ISREG(info.st_mode):
        return not_a_file(entry_kind(info.st_mode))
    try:
        fd, opened = open_regular(path)
    except NotRegular as exc:
        return not_a_file(exc.kind)
    except OSError as exc:
        if exc.errno not in UNREADABLE:
            raise
        return Examined(info.st_size, None, problems=[
            {"field": "(file)", "message": f"cannot be read: {exc.strerror or exc}"}])
    try:
        if opened.st_size > max_bytes:
            return Examined(opened.st_size, None, problems=[{"field": "(file)", "message": (
                f"the file is {opened.st_size} bytes, over the limit of {max_bytes} bytes "
                "(watch.max_order_bytes); it was not read")}])
        return examine(read_exactly(fd, opened.st_size), materials)
    finally:
        os.close(fd)
