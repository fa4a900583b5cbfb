"""Plugin distributions for tests: real ``dist-info`` folders with an ``entry_points.txt``.

The engine finds external plugins through ``importlib.metadata`` entry points
of the group ``lenslane.plugins``. A folder holding ``<name>-<version>.dist-info``
is exactly what ``pip install`` leaves in ``site-packages`` (an editable install
adds only a path to the source), so putting one on ``sys.path`` — in this
process, or through ``PYTHONPATH`` in a child — tests the real loading path.
"""
from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
EXAMPLE = REPO / "examples" / "edger-limits"
EXAMPLE_SOURCE = EXAMPLE / "src"
GROUP = "lenslane.plugins"


def write_distribution(root: Path, project: str, version: str, entry_points: dict[str, str]) -> Path:
    """Write ``root/<project>-<version>.dist-info`` declaring ``entry_points`` in ``lenslane.plugins``."""
    info = root / f"{project.replace('-', '_')}-{version}.dist-info"
    info.mkdir(parents=True)
    (info / "METADATA").write_text(f"Metadata-Version: 2.1\nName: {project}\nVersion: {version}\n", encoding="utf-8")
    lines = [f"[{GROUP}]"] + [f"{name} = {target}" for name, target in entry_points.items()]
    (info / "entry_points.txt").write_text("\n".join(lines) + "\n", encoding="utf-8")
    return info


def write_example_distribution(root: Path) -> Path:
    """The example plugin as ``pip install -e examples/edger-limits`` registers it (metadata from its pyproject)."""
    import tomllib

    project = tomllib.loads((EXAMPLE / "pyproject.toml").read_text(encoding="utf-8"))["project"]
    return write_distribution(root, project["name"], project["version"],
                              project["entry-points"][GROUP])


def example_only() -> dict[str, str]:
    """The environment that has the engine load, of the installed plugins, only the example."""
    return {"LENSLANE_DISABLE_PLUGIN_AUTOLOAD": "1", "LENSLANE_PLUGINS": "edger_limits"}


def run_lenslane(args: list[str], site: Path | None, cwd: Path) -> subprocess.CompletedProcess:
    """Run ``lenslane ARGS`` in a child process with the example plugin installed through ``site``."""
    env = dict(os.environ)
    env.update(example_only())
    paths = [str(site), str(EXAMPLE_SOURCE)] if site is not None else []
    env["PYTHONPATH"] = os.pathsep.join(paths + [p for p in [env.get("PYTHONPATH")] if p])
    return subprocess.run([sys.executable, "-m", "lenslane.cli", *args], cwd=cwd, env=env,
                          capture_output=True, text=True, check=False)
