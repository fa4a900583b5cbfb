"""The example plugin package, installed through a real entry point, in a real lab, in a child process."""
from __future__ import annotations

import contextlib
import json
import os
import shutil
import subprocess
import sys
import sysconfig

import pytest
from plugin_dists import EXAMPLE, EXAMPLE_SOURCE, example_only, run_lenslane

from lenslane.audit.log import Index, iter_records, unpack
from lenslane.lab.folder import init_lab

# An invented practice and wearer code. Frame PD 52 + 18 = 70 mm, so each eye is
# decentred 35 − 31.5 = 3.5 mm inward.
ORDER = {
    "format": "lens-order/1", "order_id": "EDG-0001", "account": "test-practice",
    "rx": {"right": {"sphere": -4.25, "cylinder": -1.25, "axis": 170,
                     "prism": [{"amount": 1.0, "base": "in"}, {"amount": 0.5, "base": "up"}]},
           "left": {"sphere": -3.75, "cylinder": -0.75, "axis": 10}},
    "lens": {"design": "single_vision", "material": "resin-1.50"},
    "frame": {"box_width_mm": 52.0, "box_height_mm": 36.0, "bridge_mm": 18.0, "effective_diameter_mm": 55.5},
    "fit": {"right": {"pd_mm": 31.5}, "left": {"pd_mm": 31.5}},
}
# From memory: minimum blank = ED + 2 × decentration + 2 mm allowance (dispensing texts,
# e.g. Brooks & Borish): 55.5 + 7.0 + 2.0.
EXPECTED_BLANK_MM = 64.5

CONFIG = """
[engine]
chain = ["validate", "normalize", "prism", "edger_limits"]
{blocked}

[stages.edger_limits]
edger = "bench edger 2"
"""


@pytest.fixture
def lab(tmp_path, example_site):
    folder = tmp_path / "lab"
    assert run_lenslane(["init", str(folder)], None, tmp_path).returncode == 0
    (folder / "lenslane.toml").write_text(CONFIG.format(blocked=""), encoding="utf-8")
    return folder


def drop_and_drain(lab, site, order=ORDER):
    (lab / "inbox" / f"{order['order_id']}.json").write_text(json.dumps(order), encoding="utf-8")
    done = run_lenslane(["watch", str(lab), "--once"], site, lab.parent)
    assert done.returncode == 0, done.stderr
    return done


def test_example_plugin_change_shows_in_result_audit_log_and_explain(lab, example_site):
    drop_and_drain(lab, example_site)

    result = json.loads((lab / "outbox" / "EDG-0001.json").read_text(encoding="utf-8"))
    edging = {"edger": "bench edger 2", "bevel": "v-bevel", "blank_mm": EXPECTED_BLANK_MM, "in_house": True}
    assert result["lenses"]["right"]["lab"]["edging"] == edging
    assert result["engine"]["stages"] == ["validate", "normalize", "prism", "edger_limits"]
    change = [c for c in result["changes"] if c["stage"] == "edger_limits"][0]
    assert change["field"] == "lenses.right.lab.edging" and change["before"] is None

    with contextlib.closing(Index(lab)) as index:  # the log's record, its story filled in from the define records
        published = [unpack(r, index.body) for r in iter_records(lab) if r["event"] == "published"][0]
    logged = [c for c in published["changes"] if c["stage"] == "edger_limits"]
    assert [c["field"] for c in logged] == ["lenses.right.lab.edging", "lenses.left.lab.edging"]
    assert logged[0]["after"] == edging
    assert published["run"]["stages"] == result["engine"]["stages"]

    told = run_lenslane(["explain", str(lab), "EDG-0001"], example_site, lab.parent)
    assert told.returncode == 0, told.stderr
    assert "Stage 4 of 4: edger_limits" in told.stdout
    # The log keeps keys sorted, so explain lists a plain object's values by name.
    assert ("lenses.right.lab.edging: (not set) → bevel v-bevel, blank 64.5 mm, edger bench edger 2, in house yes"
            in told.stdout)
    as_data = json.loads(run_lenslane(["explain", str(lab), "EDG-0001", "--json"], None, lab.parent).stdout)
    stage = as_data["processings"][0]["stages"][3]
    assert stage["stage"] == "edger_limits" and stage["changes"][0]["after"] == edging

    verified = run_lenslane(["audit", "verify", str(lab)], None, lab.parent)
    assert verified.returncode == 0 and verified.stdout.startswith("audit log intact")


def test_plugins_lists_the_example_with_its_distribution_and_version(lab, example_site):
    listed = run_lenslane(["plugins", "--lab", str(lab)], example_site, lab.parent)
    assert listed.returncode == 0, listed.stderr
    row = [line.split() for line in listed.stdout.splitlines() if line.startswith("edger_limits ")][0]
    # stage, position, enabled, from, version, plugin (the entry-point name), then the stage's own description
    assert row[:6] == ["edger_limits", "4", "yes", "lenslane-edger-limits", "1.0.0", "edger_limits"]
    assert " ".join(row[6:]) == "this lab's edger: flags frames it cannot handle, routes each lens"
    built_in = [line.split() for line in listed.stdout.splitlines() if line.startswith("normalize ")][0]
    assert built_in[3] == "built-in"


def test_blocked_example_plugin_is_not_loaded(lab, example_site):
    (lab / "lenslane.toml").write_text(
        CONFIG.format(blocked='blocked = ["edger_limits"]').replace('"prism", "edger_limits"', '"prism"')
        .replace('[stages.edger_limits]\nedger = "bench edger 2"\n', ""), encoding="utf-8")
    listed = run_lenslane(["plugins", "--lab", str(lab)], example_site, lab.parent)
    assert listed.returncode == 0, listed.stderr
    assert not [line for line in listed.stdout.splitlines() if line.startswith("edger_limits")]
    assert "blocked (not loaded): edger_limits" in listed.stdout

    in_chain = CONFIG.format(blocked='blocked = ["edger_limits"]').split("[stages.")[0]
    (lab / "lenslane.toml").write_text(in_chain, encoding="utf-8")
    refused = run_lenslane(["plugins", "--lab", str(lab)], example_site, lab.parent)
    assert refused.returncode == 2
    assert "no such stage 'edger_limits' (it is blocked in engine.blocked)" in refused.stderr


def test_trace_hooks_prints_every_hook_call_of_the_example(lab, example_site, tmp_path):
    order_file = tmp_path / "order.json"
    order_file.write_text(json.dumps(ORDER), encoding="utf-8")
    previewed = run_lenslane(["preview", str(order_file), "--lab", str(lab), "--trace-hooks"], example_site, tmp_path)
    assert previewed.returncode == 0, previewed.stderr
    traced = [line for line in previewed.stderr.splitlines() if line.startswith("[hook] lenslane_run_stage(")]
    assert len(traced) == 4  # one call per stage of the chain
    assert "'stage': 'edger_limits'" in traced[-1]
    quiet = run_lenslane(["preview", str(order_file), "--lab", str(lab)], example_site, tmp_path)
    assert "[hook]" not in quiet.stderr


def test_the_example_packages_own_tests_pass(example_site, tmp_path):
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(example_site), str(EXAMPLE_SOURCE)]), **example_only())
    ran = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", str(EXAMPLE / "tests")],
                         cwd=tmp_path, env=env, capture_output=True, text=True, check=False)
    assert ran.returncode == 0, ran.stdout + ran.stderr
    assert " passed" in ran.stdout


@pytest.mark.slow
def test_pip_install_editable_into_a_temporary_environment(tmp_path):
    """The documented path: ``pip install -e examples/edger-limits``, then ``lenslane plugins`` lists it."""
    environment = tmp_path / "env"
    # Without pip of its own: the engine's site folder (below) lends it pip and setuptools, so the build needs no index.
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(environment)], check=True)
    python = environment / "bin" / "python"
    site_packages = subprocess.run([str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                                   capture_output=True, text=True, check=True).stdout.strip()
    # The new environment sees the engine's (lenslane, pluggy, pydantic…) as a site folder of its own.
    (environment / site_packages / "lenslane-engine.pth").write_text(
        f"import site; site.addsitedir({sysconfig.get_paths()['purelib']!r})\n", encoding="utf-8")
    package = tmp_path / "edger-limits"
    shutil.copytree(EXAMPLE, package, ignore=shutil.ignore_patterns("__pycache__", "*.egg-info"))
    installed = subprocess.run([str(python), "-m", "pip", "install", "--quiet", "--no-deps", "--no-build-isolation",
                                "-e", str(package)], capture_output=True, text=True, check=False)
    assert installed.returncode == 0, installed.stderr

    lab = tmp_path / "lab"
    init_lab(lab)
    (lab / "lenslane.toml").write_text(CONFIG.format(blocked=""), encoding="utf-8")
    env = dict(os.environ, **example_only())
    listed = subprocess.run([str(python), "-m", "lenslane.cli", "plugins", "--lab", str(lab)],
                            capture_output=True, text=True, check=False, cwd=tmp_path, env=env)
    assert listed.returncode == 0, listed.stderr
    row = [line.split() for line in listed.stdout.splitlines() if line.startswith("edger_limits ")][0]
    assert row[3:5] == ["lenslane-edger-limits", "1.0.0"]
