"""File-system work the drop folder relies on: durable writes, safe opens, the lab lock.

Everything here is about not being fooled by what sits in a folder: a write
is either absent or whole after a crash, an inbox entry is never followed as a
link or opened in a way that can block, and two engines never share a lab.
"""
from __future__ import annotations

import errno
import fcntl
import hashlib
import json
import os
import stat
from pathlib import Path
from typing import Any, Callable

TEMP_SUFFIX = ".tmp"
LOCK_NAME = ".lock"
#: Longest file name (bytes) kept as it is in rejected/, held/ and archive/; longer ones are shortened
#: so that ``<name>.errors.json`` still fits the usual 255-byte limit.
NAME_KEEP_BYTES = 200

_SAFE_OPEN = os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK | os.O_CLOEXEC


class NotRegular(Exception):
    """An inbox entry that is not a plain file; ``kind`` says what it is."""

    def __init__(self, kind: str):
        super().__init__(kind)
        self.kind = kind


class LabLocked(Exception):
    """Another engine holds the lab's lock; ``holder`` is what it wrote there (its pid)."""

    def __init__(self, path: Path, holder: str):
        super().__init__(f"{path} is held by another lenslane process (pid {holder or 'unknown'})")
        self.path = path
        self.holder = holder


def _load_syncfs():
    """Linux's syncfs(2), which makes every file of one file system durable in a single call."""
    try:
        import ctypes

        function = ctypes.CDLL(None, use_errno=True).syncfs
    except (OSError, AttributeError, ImportError):
        return None
    function.argtypes = [ctypes.c_int]

    def syncfs(fd: int) -> None:
        if function(fd) != 0:
            number = ctypes.get_errno()
            raise OSError(number, os.strerror(number))

    return syncfs


_syncfs = _load_syncfs()


def _load_renameat2():
    """Linux's renameat2(2) with RENAME_NOREPLACE: a rename that fails instead of replacing its target."""
    try:
        import ctypes

        function = ctypes.CDLL(None, use_errno=True).renameat2
    except (OSError, AttributeError, ImportError):
        return None
    function.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    at_fdcwd, noreplace = -100, 1

    def renameat2(source: str, target: str) -> bool:
        """True when done; False when the file system does not offer it; raises OSError otherwise."""
        if function(at_fdcwd, os.fsencode(source), at_fdcwd, os.fsencode(target), noreplace) == 0:
            return True
        number = ctypes.get_errno()
        if number in (errno.EINVAL, errno.ENOSYS, errno.ENOTSUP):
            return False
        raise OSError(number, os.strerror(number), source, None, target)

    return renameat2


_renameat2 = _load_renameat2()


class NotALabFolder(ValueError):
    """A command was given a folder that is not a lab folder."""


def require_lab(root: Path) -> Path:
    """``root``, when it is a lab folder: one that holds an audit log (``lenslane init`` makes it; a rotated file
    counts, so a lab stopped between a rotation and its next record is one). Else :class:`NotALabFolder`, so a
    mistyped path is said to be one, never read as an empty lab or made into a new one."""
    from lenslane.audit.reader import audit_files  # the audit's own answer to which files make its log

    if not audit_files(root):
        raise NotALabFolder(f"{root} is not a lab folder (make one with `lenslane init {root}`)")
    return root


def rename_noreplace(source: str | Path, target: str | Path) -> None:
    """Rename ``source`` to ``target``, never replacing a file there: raises FileExistsError instead.

    renameat2(RENAME_NOREPLACE) where the kernel and file system offer it, else a
    hard link and an unlink (a folder, which cannot be linked, after a check).
    A crash between the link and the unlink leaves one file under both names;
    the next rename of it finds its target is the same file and only removes
    the source name.
    """
    source, target = os.fspath(source), os.fspath(target)
    try:
        if _renameat2 is not None and _renameat2(source, target):
            return
        if stat.S_ISDIR(os.lstat(source).st_mode):
            if os.path.lexists(target):
                raise FileExistsError(errno.EEXIST, os.strerror(errno.EEXIST), target)
            os.rename(source, target)
            return
        os.link(source, target, follow_symlinks=False)
    except FileExistsError:
        if not os.path.samestat(os.lstat(source), os.lstat(target)):
            raise
    os.unlink(source)


def publish_file(temp: str | Path, target: str | Path) -> None:
    """Rename a written temp file to ``target``; a file already there is kept when it has the same bytes.

    Raises FileExistsError when ``target`` holds other bytes (the temp file is then left for the caller).
    """
    try:
        rename_noreplace(temp, target)
    except FileExistsError:
        with open(temp, "rb") as handle:
            if not holds(target, handle.read()):
                raise
        _remove_quietly(temp)


def holds(path: str | Path, data: bytes) -> bool:
    """Whether the file at ``path`` holds exactly ``data``."""
    try:
        with open(path, "rb") as handle:
            return handle.read() == data
    except OSError:
        return False


def write_all(fd: int, data: bytes) -> None:
    """Write every byte of ``data`` to ``fd`` (``os.write`` may write less than it is given)."""
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view):]


def _write_temp(path: str | Path, data: bytes, sync: bool) -> str:
    folder, name = os.path.split(os.fspath(path))
    temp = os.path.join(folder, f".{name}{TEMP_SUFFIX}")
    try:
        fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_CLOEXEC, 0o644)
        try:
            write_all(fd, data)
            if sync:
                os.fsync(fd)
        finally:
            os.close(fd)
    except OSError:
        _remove_quietly(temp)
        raise
    return temp


def write_unsynced(path: str | Path, data: bytes) -> str:
    """Write ``data`` to ``.<name>.tmp`` beside ``path`` without fsync; returns the temp path.

    The caller makes the bytes durable (:func:`make_durable`) before it renames
    the temp file to ``path``: a temp name is never published, and is removed at
    the next start if a crash comes first.
    """
    return _write_temp(path, data, sync=False)


def make_durable(folder: str | Path, paths: list[str]) -> None:
    """Make the files written in ``folder`` durable: one syncfs(2) where Linux has it, else an fsync each.

    syncfs flushes the whole file system that holds ``folder``, so a batch of
    result files costs one flush instead of one per file; it returns only when
    the data is on disk, the same promise fsync gives for one file.
    """
    if _syncfs is not None:
        fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY | os.O_CLOEXEC)
        try:
            _syncfs(fd)
        finally:
            os.close(fd)
        return
    for path in paths:
        fd = os.open(path, os.O_RDONLY | os.O_CLOEXEC)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def fsync_dir(folder: str | Path) -> None:
    fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_durably(path: str | Path, data: bytes, sync_folder: bool = True) -> None:
    """Write ``data`` to ``path`` so a crash leaves either the old file or the whole new one.

    The bytes go to ``.<name>.tmp`` in the same folder, are fsynced, renamed over
    ``path``, and the folder is fsynced so the rename itself survives power loss.
    A failed write (disk full, no permission) removes its temp file and raises.
    For a file that must not replace another, :func:`create_durably`.
    """
    _write_durably(path, data, sync_folder, os.replace)


def create_durably(path: str | Path, data: bytes, sync_folder: bool = True) -> None:
    """:func:`write_durably` for a new file: never renamed over another one.

    A file already at ``path`` with the same bytes is kept (a redo wrote it
    before a crash); one with other bytes raises FileExistsError.
    """
    _write_durably(path, data, sync_folder, publish_file)


def _write_durably(path: str | Path, data: bytes, sync_folder: bool, rename: Callable[[str, str | Path], None]) -> None:
    temp = _write_temp(path, data, sync=True)
    try:
        rename(temp, path)
    except OSError:
        _remove_quietly(temp)
        raise
    if sync_folder:
        fsync_dir(os.path.dirname(os.fspath(path)) or ".")


def _remove_quietly(path: str | Path) -> None:
    try:
        os.unlink(path)
    except OSError:
        pass


def remove_temp_leftovers(folder: str | Path) -> list[str]:
    """Delete ``.<name>.tmp`` files a crash left behind (never published); returns their names."""
    removed = []
    try:
        names = os.listdir(folder)
    except FileNotFoundError:
        return removed
    for name in names:
        if name.startswith(".") and name.endswith(TEMP_SUFFIX):
            _remove_quietly(os.path.join(folder, name))
            removed.append(name)
    return removed


def shortened(name: str, keep_bytes: int = NAME_KEEP_BYTES) -> str:
    """``name`` cut to ``keep_bytes`` bytes, so that a prefix or suffix added to it still fits a file name."""
    encoded = os.fsencode(name)
    return os.fsdecode(encoded[:keep_bytes]) if len(encoded) > keep_bytes else name


def free_name(folder: str | Path, name: str, tag: str, never_ends_with: str = "",
              taken: Callable[[str], bool] | None = None) -> str:
    """A name for ``name`` in ``folder`` that nothing there uses yet, chosen the same way every time.

    The name is kept when it is free; otherwise ``.<tag>`` is added, ``tag``
    being derived from the claim, so a redo after a crash picks the same name.
    A name ending in ``never_ends_with`` (the suffix of the report files beside
    the inputs) always gets the tag, so an input can never be taken for, or
    overwrite, another input's report. ``taken`` (given a candidate) says what
    else makes a name unavailable; by default only an entry of that name.
    """
    folder = os.fspath(folder)
    if taken is None:
        taken = lambda candidate: os.path.lexists(os.path.join(folder, candidate))  # noqa: E731
    base = shortened(name)
    clash = bool(never_ends_with) and base.endswith(never_ends_with)
    if base == name and not clash and not taken(name):
        return name
    candidate, counter = f"{base}.{tag}", 0
    while taken(candidate):
        counter += 1
        candidate = f"{base}.{tag}-{counter}"
    return candidate


_KINDS = ((stat.S_ISLNK, "symbolic link"), (stat.S_ISDIR, "folder"), (stat.S_ISFIFO, "named pipe (FIFO)"),
          (stat.S_ISCHR, "character device"), (stat.S_ISBLK, "block device"), (stat.S_ISSOCK, "socket"))


def entry_kind(mode: int) -> str:
    """What a non-regular directory entry is, in plain words."""
    return next((kind for is_kind, kind in _KINDS if is_kind(mode)), "special file")


def open_regular(path: str | Path) -> tuple[int, os.stat_result]:
    """Open a plain file for reading without following a link or blocking on a pipe or device.

    Returns the descriptor and its ``fstat``; raises :class:`NotRegular` for
    anything that is not a plain file (the descriptor is then closed).
    """
    try:
        fd = os.open(path, _SAFE_OPEN)
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise NotRegular("symbolic link") from None
        if exc.errno == errno.ENXIO:  # a socket, or a device with nothing behind it
            raise NotRegular("special file") from None
        raise
    info = os.fstat(fd)
    if not stat.S_ISREG(info.st_mode):
        os.close(fd)
        raise NotRegular(entry_kind(info.st_mode))
    return fd, info


def read_exactly(fd: int, size: int) -> bytes:
    """Read a file of ``size`` bytes (from ``fstat``) in as few calls as the kernel allows."""
    chunks = []
    remaining = size
    while remaining > 0:
        chunk = os.read(fd, remaining)
        if not chunk:
            break
        chunks.append(chunk)
        remaining -= len(chunk)
    return chunks[0] if len(chunks) == 1 else b"".join(chunks)


def claim_key(info: os.stat_result) -> str:
    """Who a claimed file is: its inode and the change time its claim (a rename) gave it.

    The rename into ``work/`` sets the change time; nothing the engine does
    afterwards changes it, so the same key is read back after a restart, while a
    later file that reuses the inode gets another change time.
    """
    return f"{info.st_ino}:{info.st_ctime_ns}"


def claim_tag(claim: str) -> str:
    """A short, stable name suffix for a claim, used when a name is already taken."""
    return hashlib.sha256(claim.encode()).hexdigest()[:10]


def printable(name: str) -> str:
    """A file name as text that is always valid UTF-8 (undecodable bytes shown as ``\\xNN``)."""
    try:
        name.encode("utf-8")
        return name
    except UnicodeEncodeError:
        return os.fsencode(name).decode("utf-8", "backslashreplace")


def lock_lab(root: Path) -> int:
    """Take the lab's lock (``LAB/.lock``) for the life of the process; returns its descriptor.

    ``flock`` locks belong to the open file, so the kernel releases the lock
    when the holder exits in any way, ``kill -9`` included: a crash never blocks
    a restart. Raises :class:`LabLocked` when another process holds it, OSError when the lock file cannot be
    opened or written (the lock is then not kept).
    """
    path = Path(root) / LOCK_NAME
    fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError as exc:
        holder = os.pread(fd, 32, 0).decode("ascii", "replace").partition("\n")[0].strip()
        os.close(fd)
        if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
            raise LabLocked(path, holder) from None
        raise
    try:
        write_lock_state(fd, {})
    except OSError:
        os.close(fd)  # and with it the lock: a caller that goes on living must not keep the lab locked
        raise
    return fd


def write_lock_state(fd: int, state: dict[str, Any]) -> None:
    """Write the holder's pid, then one line of JSON about the running engine (for ``lenslane status``).

    Written in place (the lock must stay the same open file); the state line
    ends with a newline, so a reader that finds no whole line reads again.
    """
    data = f"{os.getpid()}\n{json.dumps(state, ensure_ascii=False)}\n".encode()
    os.pwrite(fd, data, 0)
    os.ftruncate(fd, len(data))


def read_lock(root: Path) -> tuple[int | None, dict[str, Any] | None, os.stat_result | None]:
    """The pid and the state line in ``LAB/.lock`` (as the last holder left them), and the lock file's stat."""
    path = Path(root) / LOCK_NAME
    for _ in range(3):
        try:
            data = path.read_bytes()
            info = path.stat()
        except FileNotFoundError:
            return None, None, None
        first, _, rest = data.partition(b"\n")
        line, newline, _ = rest.partition(b"\n")
        try:
            pid = int(first)
            return pid, (json.loads(line) if newline else {}), info
        except ValueError:
            continue  # caught while being written
    return None, None, info


def lock_holder(lock: os.stat_result, pid: int | None, locks: str | None = None) -> int | None:
    """The pid of the live process holding the lab's lock, from ``/proc/locks`` (Linux), or ``None``.

    Where ``/proc/locks`` cannot be read, whether process ``pid`` is alive.
    """
    if locks is None:
        try:
            with open("/proc/locks", encoding="ascii", errors="replace") as handle:
                locks = handle.read()
        except OSError:
            if pid is None:
                return None
            try:
                os.kill(pid, 0)
            except ProcessLookupError:
                return None
            except PermissionError:
                pass
            return pid
    for line in locks.splitlines():
        fields = line.split()
        if len(fields) < 6 or fields[1] != "FLOCK" or "->" in fields:
            continue
        device = fields[5].split(":")
        if len(device) == 3 and device[2].isdigit() and int(device[2]) == lock.st_ino and fields[4].isdigit():
            return int(fields[4])
    return None


#: File-system types whose changes made elsewhere inotify does not see (network and shared folders).
NETWORK_FILE_SYSTEMS = frozenset({
    "nfs", "nfs4", "cifs", "smb3", "smbfs", "ncpfs", "9p", "afs", "coda", "ceph", "glusterfs", "lustre",
    "gpfs", "ocfs2", "gfs2", "davfs", "virtiofs", "vboxsf", "vmhgfs", "prl_fs",
    "fuse.sshfs", "fuse.glusterfs", "fuse.s3fs", "fuse.rclone", "fuse.davfs2", "fuse.vmhgfs-fuse",
    "fuse.cephfs", "fuse.gcsfuse", "fuse.juicefs", "fuse.smbnetfs",
})


def _unescape_mount_path(text: str) -> str:
    # mountinfo writes space, tab, newline and backslash as octal escapes.
    return (text.replace("\\040", " ").replace("\\011", "\t").replace("\\012", "\n").replace("\\134", "\\"))


def filesystem_type(path: Path, mountinfo: str | None = None) -> str | None:
    """The type of the file system ``path`` lives on, from ``/proc/self/mountinfo`` (Linux).

    ``mountinfo`` may be given as text (for tests); ``None`` when unknown.
    """
    if mountinfo is None:
        try:
            with open("/proc/self/mountinfo", encoding="utf-8", errors="replace") as handle:
                mountinfo = handle.read()
        except OSError:
            return None
    target = os.path.realpath(path)
    best, best_type = "", None
    for line in mountinfo.splitlines():
        left, sep, right = line.partition(" - ")
        fields = left.split()
        if not sep or len(fields) < 5 or not right:
            continue
        mount_point = _unescape_mount_path(fields[4])
        inside = target == mount_point or target.startswith(mount_point.rstrip("/") + "/")
        if inside and len(mount_point) >= len(best):
            best, best_type = mount_point, right.split()[0]
    return best_type


def is_network_file_system(fs_type: str | None) -> bool:
    return fs_type is not None and (fs_type in NETWORK_FILE_SYSTEMS or fs_type.startswith("nfs"))
