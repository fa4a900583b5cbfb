"""What the host does with external plugins: refuse writes outside ``Stage.writes``, never load a blocked one."""
from __future__ import annotations

import contextlib
import json
import sys

import pytest

from lenslane import __version__
from lenslane.audit.log import Index, iter_records, unpack
from lenslane.chain.host import NO_AUTOLOAD_VARIABLE, PLUGINS_VARIABLE, PluginError, start_host
from lenslane.chain.pipeline import HookFailure, Pipeline
from lenslane.config import ConfigError, LabConfig
from lenslane.contract.intake import read_order
from lenslane.lab.folder import Lab, init_lab
from lenslane.report import order_story, render_text

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
    assert "(stage sneaky): may not write 'lenses.right.surfacing'" in render_text(story)


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


# --------------------------------------------------------------------------
# The contract the host enforces at start
# --------------------------------------------------------------------------

MISSPELT = '''
from lenslane import hookimpl

@hookimpl
def lenslane_result_redy(order_id, result):
    pass
'''


def test_a_misspelt_hook_stops_the_start_naming_the_entry_point(install_plugin):
    module = install_plugin("observer", MISSPELT, project="lenslane-observer", version="1.2.0")
    with pytest.raises(PluginError) as caught:
        start_host(LabConfig())
    message = str(caught.value)
    assert f"entry point 'observer = {module}'" in message and "lenslane-observer 1.2.0" in message
    assert "'lenslane_result_redy', which is not a lenslane hook" in message


def test_the_command_line_exits_2_on_a_misspelt_hook(install_plugin, tmp_path, capsys):
    from lenslane.cli import main

    install_plugin("observer", MISSPELT)
    assert main(["plugins"]) == 2
    assert "lenslane: bad plugin: plugin 'observer' (entry point 'observer = " in capsys.readouterr().err


def test_blocked_must_name_a_plugin(install_plugin):
    install_plugin("probe", PROBE)
    with pytest.raises(ConfigError, match=r"engine\.blocked\[1\]: no plugin is named 'nosuch'"):
        start_host(LabConfig.model_validate({"engine": {"blocked": ["probe", "nosuch"]}}))
    # A blocked installed plugin is still a known name, and so is a built-in.
    start_host(LabConfig.model_validate({"engine": {"blocked": ["probe", "safety"],
                                                    "chain": ["validate", "normalize"]}}))


def test_a_stage_table_is_checked_when_the_stage_is_not_in_the_chain():
    # geometry is out of the chain, its table still goes through its parameter model.
    with pytest.raises(ConfigError, match=r"stages\.geometry\.no_such_key"):
        start_host(LabConfig.model_validate({"engine": {"chain": ["validate", "normalize"]},
                                             "stages": {"geometry": {"no_such_key": 1}}}))


OBSERVER = '''
from lenslane import hookimpl

SEEN = []

@hookimpl
def lenslane_result_ready(order_id, result):
    SEEN.append(order_id)
    if result["order_id"].endswith("BOOM"):
        raise RuntimeError("the lab's system is down")
'''


def test_a_failing_result_hook_rejects_the_order_naming_plugin_distribution_and_hook(tmp_path, install_plugin,
                                                                                      order_dict):
    install_plugin("observer", OBSERVER, project="lenslane-observer", version="1.2.0")
    lab = lab_with(tmp_path, {"engine": {"chain": ["validate", "normalize"]}})
    order_dict["order_id"] = "TST-BOOM"
    (lab.inbox / "TST-BOOM.json").write_text(json.dumps(order_dict), encoding="utf-8")
    [processed] = lab.drain()
    assert processed.outcome == "rejected"
    assert processed.reasons == [{"field": "(plugin observer: lenslane_result_ready)",
                                  "message": "RuntimeError: the lab's system is down (lenslane-observer 1.2.0)"}]
    told = render_text(order_story(lab.root, "TST-BOOM"))
    assert "Stage 2 of 2: normalize" in told  # the whole chain ran; the hook after it failed


def test_preview_runs_no_side_effect_hook(tmp_path, install_plugin, order_dict, capsys):
    import importlib

    from lenslane.cli import main

    module = importlib.import_module(install_plugin("observer", OBSERVER))
    order_file = tmp_path / "order.json"
    order_file.write_text(json.dumps(order_dict), encoding="utf-8")
    assert main(["preview", str(order_file)]) == 0
    assert module.SEEN == []
    published = json.loads(capsys.readouterr().out)
    assert published["engine"]["hooks"] == [{"plugin": "observer", "distribution": "lenslane-test-observer",
                                             "version": "0.1.0", "hooks": ["lenslane_result_ready"]}]


FAILING_WRAPPER = '''
from lenslane import hookimpl

@hookimpl(wrapper=True)
def lenslane_run_stage(stage, view, params):
    proposals = yield
    if stage.name == "prism":
        raise KeyError("metrics server")
    return proposals
'''


def test_a_failing_run_stage_wrapper_is_named_not_the_stage_it_wrapped(install_plugin, order_dict):
    install_plugin("metrics", FAILING_WRAPPER, project="lenslane-metrics", version="3.0")
    host = start_host(LabConfig.model_validate({"engine": {"chain": ["validate", "normalize", "prism"]}}))
    order, parsed = read_order(json.dumps(order_dict).encode(), host.settings.materials)
    with pytest.raises(HookFailure) as caught:
        Pipeline(host).run(order, parsed)
    assert caught.value.field == "(plugin metrics: lenslane_run_stage)"
    assert caught.value.message == "KeyError: 'metrics server' (lenslane-metrics 3.0 while stage 'prism' ran)"


def test_a_hook_only_plugin_is_listed_by_lenslane_plugins(install_plugin, capsys):
    from lenslane.cli import main

    install_plugin("observer", OBSERVER, project="lenslane-observer", version="1.2.0")
    assert main(["plugins"]) == 0
    out = capsys.readouterr().out
    hook_rows = out.split("plugins without stages (hooks only):")[1]
    rows = [line.split() for line in hook_rows.strip().splitlines()]
    assert ["observer", "lenslane-observer", "1.2.0", "lenslane_result_ready"] in rows
    assert ["core", "built-in", __version__, "lenslane_run_stage"] in rows


def test_results_and_published_records_name_each_stages_distribution_and_version(tmp_path, install_plugin,
                                                                                 order_dict):
    install_plugin("probe", PROBE, project="lenslane-probe", version="2.3.4")
    lab = lab_with(tmp_path, {"engine": {"chain": ["normalize", "probe"]}})
    (lab.inbox / "TST-0001.json").write_text(json.dumps(order_dict), encoding="utf-8")
    [processed] = lab.drain()
    assert processed.outcome == "published"
    chain = [{"stage": "normalize", "plugin": "normalize", "distribution": "lenslane", "version": __version__},
             {"stage": "probe", "plugin": "probe", "distribution": "lenslane-probe", "version": "2.3.4"}]
    result = json.loads((lab.outbox / "TST-0001.json").read_text(encoding="utf-8"))
    assert result["engine"]["version"] == __version__ and result["engine"]["chain"] == chain
    with contextlib.closing(Index(lab.root)) as index:  # the log's record, its run filled in from its define record
        [published] = [unpack(r, index.body) for r in iter_records(lab.root) if r["event"] == "published"]
    assert published["run"]["engine_version"] == __version__ and published["run"]["chain"] == chain
    assert "Stage 2 of 2: probe (lenslane-probe 2.3.4)" in render_text(order_story(lab.root, "TST-0001"))


def test_with_autoload_off_only_the_installed_plugins_named_are_loaded(install_plugin, monkeypatch):
    install_plugin("probe", PROBE)
    install_plugin("observer", OBSERVER)
    monkeypatch.setenv(NO_AUTOLOAD_VARIABLE, "1")
    monkeypatch.setenv(PLUGINS_VARIABLE, "observer")
    host = start_host(LabConfig())
    assert "probe" not in host.stages and "observer" in host.plugins
    assert "probe" in start_host(LabConfig(), installed=True).stages
    monkeypatch.setenv(NO_AUTOLOAD_VARIABLE, "0")
    assert "probe" in start_host(LabConfig()).stages
