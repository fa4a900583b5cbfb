"""What the host does with external plugins: refuse writes outside ``Stage.writes``, never load a blocked one."""
from __future__ import annotations

import json
import sys

import pytest

from lenslane.config import ConfigError, LabConfig
from lenslane.report.explain import order_story, render
from lenslane.chain.host import start_host
from lenslane.lab.folder import Lab, init_lab
from lenslane.contract.intake import read_order
from lenslane.chain.pipeline import Pipeline

SNEAKY = '''
from lenslane import Change, Stage, hookimpl

def run(view, params):
    # Declares only a lab note, then tries to change the power to be surfaced.
    yield Change("lenses.right.surfacing", {"sphere": -9.0, "cylinder": 0.0, "axis": 180},
                 "An attempt to change the power.", "none", "Common practice")

@hookimpl
def lenslane_stages():
    return [Stage(name="sneaky", run=run, writes=("lenses.*.lab.note",))]
'''

PROBE = '''
from lenslane import Flag, Stage, hookimpl

@hookimpl
def lenslane_stages():
    return [Stage(name="probe", run=lambda view, params: [Flag("probe", "info", "The probe ran.")])]
'''


def lab_with(tmp_path, config: dict) -> Lab:
    root = tmp_path / "lab"
    init_lab(root)
    return Lab(root, start_host(LabConfig.model_validate(config)))


def test_a_stage_writing_outside_its_declared_fields_is_refused(tmp_path, install_plugin, order_dict):
    install_plugin("sneaky", SNEAKY)
    lab = lab_with(tmp_path, {"engine": {"chain": ["normalize", "sneaky"]}})
    (lab.inbox / "TST-0001.json").write_text(json.dumps(order_dict), encoding="utf-8")

    [processed] = lab.drain()

    assert processed.outcome == "rejected"
    [problem] = processed.reasons
    assert problem["field"] == "(stage sneaky)"
    assert "may not write 'lenses.right.surfacing'" in problem["message"]
    assert "lenses.*.lab.note" in problem["message"]
    assert not (lab.outbox / "TST-0001.json").exists()
    report = json.loads((lab.rejected / "TST-0001.json.errors.json").read_text(encoding="utf-8"))
    assert report["problems"] == [problem]
    story = order_story(lab.root, "TST-0001")
    assert story["processings"][0]["outcome"]["reasons"] == [problem]
    assert [s["stage"] for s in story["processings"][0]["stages"]] == ["normalize", "sneaky"]
    assert "(stage sneaky): may not write 'lenses.right.surfacing'" in render(story)


def test_blocked_plugin_is_not_loaded(install_plugin):
    module = install_plugin("probe", PROBE)

    host = start_host(LabConfig.model_validate({"engine": {"blocked": ["probe"]}}))

    assert module not in sys.modules  # never imported, so none of its code ran
    assert "probe" not in host.stages
    assert not host.plugin_manager.has_plugin("probe")


def test_the_same_plugin_unblocked_is_loaded_and_runs(install_plugin, order_dict):
    module = install_plugin("probe", PROBE, project="lenslane-probe", version="2.3.4")
    host = start_host(LabConfig.model_validate({"engine": {"chain": ["normalize", "probe"]}}))

    assert module in sys.modules
    assert (host.stages["probe"].origin, host.stages["probe"].version) == ("lenslane-probe", "2.3.4")
    order, parsed = read_order(json.dumps(order_dict).encode(), host.settings.materials)
    assert [f["code"] for f in Pipeline(host).run(order, parsed).result["flags"]] == ["probe"]


def test_a_blocked_stage_named_in_the_chain_stops_the_engine(install_plugin):
    install_plugin("probe", PROBE)
    with pytest.raises(ConfigError, match=r"engine.chain\[1\]: no such stage 'probe' \(it is blocked"):
        start_host(LabConfig.model_validate({"engine": {"chain": ["normalize", "probe"], "blocked": ["probe"]}}))
