"""Helpers for driving a real ``lenslane watch`` process on a temporary lab.

Every test in this folder runs the product as a user does: ``python -m lenslane.cli
watch`` in a subprocess, with files put into its inbox the way practices put them
(renamed in, or written in place), and looks at the folders and the audit log
afterwards. Waiting uses generous timeouts; nothing asserts on time taken.
"""
from __future__ import annotations

import contextlib
import copy
import hashlib
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any, Callable, Iterable

import pytest

from lenslane.chain.host import NO_AUTOLOAD_VARIABLE, PLUGINS_VARIABLE
from lenslane.audit.log import iter_records, verify
from lenslane.config import DEFAULT_CHAIN
from lenslane.lab.claim import Claims
from lenslane.lab.folder import init_lab
from lenslane.contract.models import LensOrderResult
from tests.conftest import BASE_ORDER, REPO

WAIT_SECONDS = 120.0  # generous: only ever waited for, never asserted on

#: Watch settings for test labs: short quiet and young times and frequent rescans keep the suite quick.
FAST_WATCH = {"quiet_seconds": 0.2, "young_seconds": 2.0, "rescan_seconds": 1.0, "order_time_limit_seconds": 10.0,
              "retry_max_seconds": 2.0}

FAULT_PLUGIN = '''\
"""Test-only stages: fail on request, to check the daemon survives a faulty plugin."""
import os
import time

from lenslane import Stage, hookimpl


def run(view, params):
    wearer = view.order.wearer
    request = wearer.ref if wearer is not None else None
    if request == "RAISE":
        raise RuntimeError("asked to fail by the test order")
    if request in ("HANG", "SWALLOW"):
        marker = os.environ.get("LENSLANE_TEST_MARKER")
        if marker:
            open(marker, "w").close()
    if request == "HANG":
        time.sleep(3600)
    if request == "SWALLOW":
        while True:
            try:
                time.sleep(3600)
            except Exception:
                pass
    return []


@hookimpl
def lenslane_stages():
    return [Stage(name="on_request", run=run, description="fails, hangs or hangs stubbornly on request")]
'''


def order(order_id: str, **changes: Any) -> dict[str, Any]:
    """A valid order of the invented test practice with ``order_id``; ``changes`` replace top-level keys."""
    data = copy.deepcopy(BASE_ORDER)
    data["order_id"] = order_id
    data.update(changes)
    return data


def order_bytes(order_id: str, **changes: Any) -> bytes:
    return json.dumps(order(order_id, **changes), indent=1).encode()


def make_lab(root: Path, watch: dict[str, Any] | None = None, chain: list[str] | None = None) -> Path:
    """A lab folder with a config of the given watch settings (FAST_WATCH by default)."""
    init_lab(root)
    settings = dict(FAST_WATCH if watch is None else watch)
    lines = ["[watch]"] + [f"{key} = {json.dumps(value)}" for key, value in settings.items()]
    if chain is not None:
        lines = ["[engine]", f"chain = {json.dumps(chain)}", ""] + lines
    (root / "lenslane.toml").write_text("\n".join(lines) + "\n")
    (root / "staging").mkdir(exist_ok=True)
    return root


def drop(lab: Path, name: str, data: bytes) -> Path:
    """Put a complete file into the inbox the safe way: write beside it, then rename it in."""
    staged = lab / "staging" / name
    staged.write_bytes(data)
    target = lab / "inbox" / name
    os.rename(staged, target)
    return target


def wait_until(condition: Callable[[], Any], what: str, timeout: float = WAIT_SECONDS, every: float = 0.02) -> Any:
    """Poll ``condition`` until it is truthy; fail naming ``what`` if it never is."""
    deadline = time.monotonic() + timeout
    while True:
        value = condition()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"gave up waiting for {what}")
        time.sleep(every)


@contextlib.contextmanager
def read_only(*paths):
    """The paths as a reader who may not write them sees them: immutable for root (whom modes do not stop), else
    without write permission; given back afterwards."""
    if os.geteuid() == 0:
        subprocess.run(["chattr", "+i", *map(str, paths)], check=True)
        try:
            yield
        finally:
            subprocess.run(["chattr", "-i", *map(str, paths)], check=True)
        return
    modes = {path: path.stat().st_mode for path in paths}
    for path in paths:
        path.chmod(modes[path] & ~0o222)
    try:
        yield
    finally:
        for path, mode in modes.items():
            path.chmod(mode)


def names(folder: Path) -> list[str]:
    return sorted(os.listdir(folder))


def claimed(lab: Path) -> list[str]:
    """The names the inputs in ``work/`` arrived under (``work/`` holds them under claim names of their own)."""
    return sorted(Claims.original_name(name) for name in os.listdir(lab / "work"))


def count(folder: Path) -> int:
    return len(os.listdir(folder))


class Watch:
    """A real ``lenslane watch`` process on a lab; its JSON log lines are kept in a file."""

    def __init__(self, lab: Path, *args: str, env: dict[str, str] | None = None, ready: bool = True,
                 new_session: bool = False, crash_after: str | None = None):
        self.lab = lab
        number = len(list(lab.parent.glob(f"{lab.name}-watch-*.log")))
        self.log_path = lab.parent / f"{lab.name}-watch-{number}.log"
        self.err_path = lab.parent / f"{lab.name}-watch-{number}.err"
        with open(self.log_path, "wb") as out, open(self.err_path, "wb") as err:
            # crash_after: the engine ends abruptly right after that step (tests/system/crashing.py).
            command = ["-m", "tests.system.crashing", "--command", crash_after] if crash_after else ["-m", "lenslane.cli"]
            self.process = subprocess.Popen([sys.executable, *command, "watch", str(lab), *args],
                                            stdout=out, stderr=err, cwd=REPO, env=environment(env),
                                            start_new_session=new_session)
        if ready and "--once" not in args:
            self.wait_for("observer")

    def lines(self) -> list[dict[str, Any]]:
        found = []
        for line in self.log_path.read_text(errors="replace").splitlines():
            try:
                found.append(json.loads(line))
            except ValueError:
                continue
        return found

    def events(self, event: str) -> list[dict[str, Any]]:
        return [line for line in self.lines() if line.get("event") == event]

    def wait_for(self, event: str, where: Callable[[dict[str, Any]], bool] = lambda line: True,
                 timeout: float = WAIT_SECONDS) -> dict[str, Any]:
        def seen():
            if self.process.poll() is not None and not [x for x in self.events(event) if where(x)]:
                raise AssertionError(f"lenslane watch exited {self.process.returncode} before logging {event!r}:\n"
                                     f"{self.log_path.read_text()}\n{self.err_path.read_text()}")
            return next((line for line in self.events(event) if where(line)), None)

        return wait_until(seen, f"log line {event!r}", timeout)

    def stop(self, sig: int = signal.SIGTERM) -> int:
        if self.process.poll() is None:
            self.process.send_signal(sig)
        return self.wait()

    def kill(self) -> int:
        if self.process.poll() is None:
            self.process.kill()  # SIGKILL: no clean-up of any kind
        return self.wait()

    def kill_group(self) -> int:
        """SIGKILL to the engine's whole process group (it must have been started with ``new_session``)."""
        if self.process.poll() is None:
            os.killpg(self.process.pid, signal.SIGKILL)
        return self.wait()

    def wait(self, timeout: float = WAIT_SECONDS) -> int:
        try:
            return self.process.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            self.process.kill()
            raise AssertionError(f"lenslane watch did not exit:\n{self.log_path.read_text()}") from None

    def peak_memory_kib(self) -> int:
        for line in Path(f"/proc/{self.process.pid}/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1])
        raise AssertionError("no VmHWM line")


def environment(extra: dict[str, str] | None = None) -> dict[str, str]:
    # Kept: the suite's own setting that the engine loads no installed plugin but those a test names.
    env = {k: v for k, v in os.environ.items() if not k.startswith("LENSLANE_") or k == NO_AUTOLOAD_VARIABLE}
    env.update(extra or {})
    return env


def run_once(lab: Path, env: dict[str, str] | None = None, extra_args: list[str] = ()) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "lenslane.cli", "watch", str(lab), "--once", *extra_args],
                          capture_output=True, text=True, cwd=REPO, env=environment(env), timeout=WAIT_SECONDS)


def run_crashing(lab: Path, step: str, take: Iterable[str] = ()) -> subprocess.CompletedProcess:
    """``watch --once`` that crashes right after ``step`` (``STEP[:N]``, see tests/system/crashing.py).

    With ``take``, the engine takes exactly these inbox names, in this order, and commits them as one batch.
    """
    return subprocess.run([sys.executable, "-m", "tests.system.crashing", str(lab), step, *take],
                          capture_output=True, text=True, cwd=REPO, env=environment(), timeout=WAIT_SECONDS)


def temp_leftovers(lab: Path) -> list[str]:
    return [f"{folder}/{name}" for folder in ("inbox", "outbox", "rejected", "held", "archive", "work")
            for name in os.listdir(lab / folder) if name.startswith(".") and name.endswith(".tmp")]


def published_records(lab: Path) -> list[dict[str, Any]]:
    return [r for r in iter_records(lab) if r.get("event") == "published"]


def assert_exactly_once(lab: Path, sent: dict[str, dict[str, Any]]) -> None:
    """Every order sent (file name → order) is published exactly once, whole, and recorded exactly once."""
    assert [n for n in names(lab / "inbox") if n.endswith(".json")] == []
    assert names(lab / "work") == []
    assert temp_leftovers(lab) == []
    expected_ids = sorted(o["order_id"] for o in sent.values())
    assert names(lab / "outbox") == sorted(f"{i}.json" for i in expected_ids)
    assert names(lab / "archive") == sorted(sent)
    for order_id in expected_ids:
        result = json.loads((lab / "outbox" / f"{order_id}.json").read_bytes())  # whole JSON, or this fails
        LensOrderResult.model_validate(result)
        assert result["order_id"] == order_id
    by_name = {o["order_id"]: o for o in sent.values()}
    for order_id in expected_ids[:: max(1, len(expected_ids) // 20)]:  # a sample: the result echoes what was sent
        assert json.loads((lab / "outbox" / f"{order_id}.json").read_bytes())["order"] == by_name[order_id]
    recorded = [r["order_id"] for r in published_records(lab)]
    assert sorted(recorded) == expected_ids, "each order has exactly one published record"
    for record in published_records(lab):
        data = (lab / "outbox" / f"{record['order_id']}.json").read_bytes()
        assert hashlib.sha256(data).hexdigest() == record["result_sha256"]
    report = verify(lab)
    assert report.ok, report.summary()


def write_backlog(lab: Path, count_: int, prefix: str = "BK") -> dict[str, dict[str, Any]]:
    """``count_`` orders straight into the inbox (as if they arrived while the engine was down)."""
    sent = {}
    for index in range(count_):
        data = order(f"{prefix}-{index:05d}")
        name = f"{prefix.lower()}-{index:05d}.json"
        (lab / "inbox" / name).write_text(json.dumps(data))
        sent[name] = data
    old = time.time() - 60  # written a while ago: no quiet time to wait for
    for name in sent:
        os.utime(lab / "inbox" / name, (old, old))
    return sent


@pytest.fixture
def fault_plugin(tmp_path) -> dict[str, str]:
    """A small distribution with a ``lenslane.plugins`` entry point, installed into a folder on the path.

    The engine loads it through pluggy's entry-point loading, as any
    integrator's package; returns the environment that puts it on the path.
    """
    site = tmp_path / "site"
    dist_info = site / "lenslane_fault_stages-1.0.dist-info"
    dist_info.mkdir(parents=True)
    (site / "lenslane_fault_stages.py").write_text(FAULT_PLUGIN)
    (dist_info / "METADATA").write_text("Metadata-Version: 2.1\nName: lenslane-fault-stages\nVersion: 1.0\n")
    (dist_info / "entry_points.txt").write_text("[lenslane.plugins]\nfault_stages = lenslane_fault_stages\n")
    (dist_info / "RECORD").write_text("")
    path = os.pathsep.join(filter(None, [str(site), os.environ.get("PYTHONPATH")]))
    return {"PYTHONPATH": path, PLUGINS_VARIABLE: "fault_stages"}


FAULT_CHAIN = [*DEFAULT_CHAIN, "on_request"]


def sha256_of(paths: Iterable[Path]) -> dict[str, str]:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in paths}
