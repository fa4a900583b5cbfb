"""The package as pip installs it (not editable): what ships, that it works, and that its author API type-checks.

The build uses this environment's setuptools (``--no-build-isolation``) and
its dependencies (``--no-deps``), into a temporary folder; the installed copy
is then put first on ``PYTHONPATH``, ahead of the editable one.
"""
from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent

AUTHOR_PLUGIN = '''
from __future__ import annotations

from collections.abc import Iterator

from pydantic import BaseModel

from lenslane import HOOK_API_VERSION, Change, Flag, OrderView, Proposal, Stage, hookimpl


class Limits(BaseModel):
    max_width_mm: float = 60.0


def run(view: OrderView, params: Limits) -> Iterator[Proposal]:
    if view.order.frame.box_width_mm > params.max_width_mm:
        yield Flag("wide-frame", "info", "Box width over the limit.", values={"limit_mm": params.max_width_mm})
    for eye in view.eyes:
        yield Change(f"lenses.{eye}.lab.note", "checked", "Noted.", "lab note", "Common practice", {"eye": eye})


@hookimpl
def lenslane_stages() -> list[Stage]:
    assert HOOK_API_VERSION >= (1, 0)
    return [Stage(name="wide", run=run, writes=("lenses.*.lab.note",), params=Limits)]
'''


def clean_copy(folder: str, names: list[str]) -> set[str]:
    """What not to copy: the environment, the git data, caches, builds and a lab of ``make run``."""
    top = {".venv", ".git", "build", "lab"} if Path(folder) == REPO else set()
    return {n for n in names if n in top or n in ("__pycache__", ".pytest_cache", ".mypy_cache")
            or n.endswith(".egg-info")}


@pytest.fixture(scope="module")
def installed(tmp_path_factory) -> Path:
    """``pip install --no-deps --target SITE .`` of a copy of the repository; returns SITE."""
    root = tmp_path_factory.mktemp("packaging")
    source = root / "source"
    shutil.copytree(REPO, source, ignore=clean_copy)
    site = root / "site"
    built = subprocess.run([sys.executable, "-m", "pip", "install", "--quiet", "--no-deps", "--no-build-isolation",
                            "--target", str(site), str(source)], capture_output=True, text=True, check=False)
    assert built.returncode == 0, built.stderr
    return site


def run_installed(site: Path, *args: str, cwd: Path) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=str(site))
    return subprocess.run([sys.executable, *args], cwd=cwd, env=env, capture_output=True, text=True, check=False)


def test_only_the_lenslane_package_is_installed_with_its_data(installed):
    top = sorted(p.name for p in installed.iterdir() if not p.name.endswith(".dist-info") and p.name != "bin")
    assert top == ["lenslane"]  # no top-level engine, plugins or config module
    for shipped in ("py.typed", "defaults/lenslane.toml", "defaults/lenslane.service", "vocabulary.py",
                    "testing/fixtures.py", "report/notation.py", "web/templates/order.html"):
        assert (installed / "lenslane" / shipped).is_file(), shipped
    [dist] = installed.glob("lenslane-*.dist-info")
    assert "[pytest11]\nlenslane = lenslane.testing.fixtures" in (dist / "entry_points.txt").read_text()


def test_the_installed_copy_inits_a_lab_drains_it_and_explains_an_order(installed, tmp_path):
    where = run_installed(installed, "-c", "import lenslane; print(lenslane.__file__)", cwd=tmp_path)
    assert where.stdout.strip() == str(installed / "lenslane" / "__init__.py")  # not the editable source

    lab = tmp_path / "lab"
    assert run_installed(installed, "-m", "lenslane.cli", "init", str(lab), cwd=tmp_path).returncode == 0
    assert "[stages.vertex]" in (lab / "lenslane.toml").read_text(encoding="utf-8")  # the shipped template
    sample = REPO / "inbox_samples" / "progressive-minus-tilt-vertex-prism.json"
    order_id = json.loads(sample.read_text(encoding="utf-8"))["order_id"]
    shutil.copy(sample, lab / "inbox")
    drained = run_installed(installed, "-m", "lenslane.cli", "watch", str(lab), "--once", cwd=tmp_path)
    assert drained.returncode == 0, drained.stderr
    assert (lab / "outbox" / f"{order_id}.json").is_file()
    told = run_installed(installed, "-m", "lenslane.cli", "explain", str(lab), order_id, cwd=tmp_path)
    assert told.returncode == 0, told.stderr
    assert f"Order {order_id}" in told.stdout and "licensed" in told.stdout


def test_the_author_api_passes_mypy_strict(installed, tmp_path):
    # mypy cannot follow an editable install's import hook; the installed copy is read through MYPYPATH.
    (tmp_path / "wide_plugin.py").write_text(AUTHOR_PLUGIN, encoding="utf-8")
    checked = subprocess.run([sys.executable, "-m", "mypy", "--strict", "--no-incremental", "--cache-dir",
                              os.devnull, "wide_plugin.py"], cwd=tmp_path, env=dict(os.environ, MYPYPATH=str(installed)),
                             capture_output=True, text=True, check=False)
    assert checked.returncode == 0, checked.stdout + checked.stderr
    assert "Success: no issues found" in checked.stdout
