"""Every hook in ``engine/hookspecs.py``: documented (docstring with an example, a section in
DEVELOPERS.md with its exact signature and a runnable example) and tested (``HOOK_TESTS``).

Adding a hook to ``engine/hookspecs.py`` makes these tests fail until it has all three.
"""
from __future__ import annotations

import doctest
import inspect
import json
import re
import types
from pathlib import Path

import pluggy
import pytest

from lenslane import Flag, Stage
from lenslane.chain import hookspecs
from lenslane.config import ConfigError, LabConfig
from lenslane.chain.host import PLUGINS_VARIABLE, start_host
from lenslane.contract.intake import read_order
from lenslane.chain.pipeline import Pipeline, StageFailure

DEVELOPERS = Path(__file__).resolve().parents[2] / "DEVELOPERS.md"


def hook_specs() -> dict[str, object]:
    """The hooks declared in engine/hookspecs.py, by name."""
    marker = f"{hookspecs.PROJECT}_spec"
    return {name: fn for name, fn in vars(hookspecs).items() if callable(fn) and hasattr(fn, marker)}


def signature_line(fn) -> str:
    """``def name(arg: Type, …) -> Return`` from the hookspec itself (string annotations unquoted)."""
    annotations = {k: v.strip("\"'") if isinstance(v, str) else v for k, v in fn.__annotations__.items()}
    args = ", ".join(f"{name}: {annotations[name]}" for name in inspect.signature(fn).parameters)
    return f"def {fn.__name__}({args}) -> {annotations['return']}"


def developers_section(name: str) -> str:
    text = DEVELOPERS.read_text(encoding="utf-8")
    match = re.search(rf"^### `{name}`\n(.*?)(?=^#{{2,3}} )", text, re.S | re.M)
    assert match, f"DEVELOPERS.md has no section '### `{name}`'"
    return match.group(1)


def run_order(host, order_dict) -> dict:
    order, parsed = read_order(json.dumps(order_dict).encode(), host.settings.materials)
    return Pipeline(host).run(order, parsed).result


# --------------------------------------------------------------------------
# One or more behaviour tests per hook
# --------------------------------------------------------------------------

NOTE_STAGE = '''
from lenslane import Change, Flag, Stage, hookimpl

def run(view, params):
    for eye in view.eyes:
        yield Change(f"lenses.{eye}.lab.note", "checked", "The lab notes the order was checked.",
                     "lab note", "Common practice", {"eye": eye})
    yield Flag("lab-note", "info", "A note of the lab.")

@hookimpl
def lenslane_stages():
    return [Stage(name="lab_note", run=run, writes=("lenses.*.lab.note",))]
'''


def test_a_plugin_of_the_same_name_installed_beside_a_test_plugin_is_not_loaded_with_it(install_plugin, order_dict,
                                                                                        monkeypatch):
    # Another distribution's "lab_note" in the environment, not asked for: the test names its own by module.
    install_plugin("lab_note", NOTE_STAGE.replace("checked", "someone else's"), project="someone-elses-lab-note")
    monkeypatch.setenv(PLUGINS_VARIABLE, "")
    install_plugin("lab_note", NOTE_STAGE)
    host = start_host(LabConfig.model_validate({"engine": {"chain": ["normalize", "lab_note"]}}))
    result = run_order(host, order_dict)
    assert result["lenses"]["right"]["lab"] == {"note": "checked"}
    assert [entry["distribution"] for entry in result["engine"]["chain"] if entry["stage"] == "lab_note"] == [
        "lenslane-test-lab-note"]


SPHERE_STAGE = '''
from lenslane import Change, Stage, hookimpl

def run(view, params):
    for eye in view.eyes:
        yield Change(f"lenses.{eye}.surfacing.sphere", -7.75, "The lab's own correction.", "lab rule", "Common practice")

@hookimpl
def lenslane_stages():
    return [Stage(name="sphere_nudge", run=run, writes=("lenses.*.surfacing.sphere",))]
'''


def test_explain_tells_each_change_as_recorded_when_a_later_change_sets_a_part_of_it(install_plugin, make_lab, drop,
                                                                                   order_dict):
    # normalize sets lenses.<eye>.surfacing whole; a later stage sets its sphere: the story must tell normalize's
    # change as the log holds it, and the final lens with the later sphere.
    from lenslane.audit.index import level_index
    from lenslane.audit.log import iter_records, unpack
    from lenslane.report import order_story

    install_plugin("sphere_nudge", SPHERE_STAGE)
    lab = make_lab({"engine": {"chain": ["validate", "normalize", "sphere_nudge"]}})
    drop(lab, order_dict)
    lab.drain()
    with level_index(lab.root) as index:
        [record] = [unpack(r, index.body) for r in iter_records(lab.root) if r.get("event") == "published"]
    recorded = {c["field"]: c["after"] for c in record["changes"] if c["stage"] == "normalize"}
    [processing] = order_story(lab.root, order_dict["order_id"])["processings"]
    told = {c["field"]: c["after"] for stage in processing["stages"] if stage["stage"] == "normalize"
            for c in stage["changes"]}
    assert told["lenses.right.surfacing"] == recorded["lenses.right.surfacing"]
    assert told["lenses.right.surfacing"]["sphere"] != -7.75
    assert processing["lenses"]["right"]["surfacing"]["sphere"] == -7.75


def test_stages_from_a_plugin_run_in_the_chain_and_are_recorded(install_plugin, order_dict):
    install_plugin("lab_note", NOTE_STAGE)
    host = start_host(LabConfig.model_validate({"engine": {"chain": ["normalize", "lab_note"]}}))
    result = run_order(host, order_dict)
    assert result["lenses"]["right"]["lab"] == {"note": "checked"}
    assert [(c["stage"], c["field"]) for c in result["changes"]][-2:] == [
        ("lab_note", "lenses.right.lab.note"), ("lab_note", "lenses.left.lab.note")]
    assert result["flags"] == [{"code": "lab-note", "level": "info", "eye": None,
                                "message": "A note of the lab.", "stage": "lab_note"}]


def test_two_plugins_providing_one_stage_name_stop_the_engine(install_plugin):
    install_plugin("first", NOTE_STAGE)
    install_plugin("second", NOTE_STAGE)
    with pytest.raises(ConfigError, match="stage 'lab_note' is provided by both"):
        start_host(LabConfig())


MATERIAL = '''
from lenslane import hookimpl

@hookimpl
def lenslane_materials():
    return {"trivex-1.53": {"index": 1.532, "abbe": 45, "density": 1.11}}
'''


def test_materials_from_a_plugin_are_accepted_in_orders(install_plugin, order_dict):
    install_plugin("trivex", MATERIAL)
    host = start_host(LabConfig())
    order_dict["lens"]["material"] = "trivex-1.53"
    order, _ = read_order(json.dumps(order_dict).encode(), host.settings.materials)
    assert order.lens.material == "trivex-1.53"
    # The values are the plugin's own, passed through unchanged.
    assert host.settings.materials["trivex-1.53"].index == 1.532


def test_the_lab_config_overrides_a_plugins_material(install_plugin):
    install_plugin("trivex", MATERIAL)
    config = LabConfig.model_validate({"materials": {"trivex-1.53": {"index": 1.53, "abbe": 44.0, "density": 1.1}}})
    assert start_host(config).settings.materials["trivex-1.53"].index == 1.53


TIMING_WRAPPER = '''
from lenslane import hookimpl

SEEN = []

@hookimpl(wrapper=True)
def lenslane_run_stage(stage, view, params):
    proposals = yield
    SEEN.append((stage.name, len(proposals)))
    return proposals
'''


def test_a_run_stage_wrapper_sees_every_stage_and_changes_nothing(install_plugin, order_dict):
    import importlib

    module = importlib.import_module(install_plugin("timing", TIMING_WRAPPER))
    chain = {"engine": {"chain": ["validate", "normalize", "prism"]}}
    host = start_host(LabConfig.model_validate(chain))
    wrapped = run_order(host, order_dict)
    assert [name for name, _ in module.SEEN] == ["validate", "normalize", "prism"]
    # normalize proposes rx and surfacing for each of the two eyes; prism one value per eye.
    assert dict(module.SEEN)["normalize"] == 4 and dict(module.SEEN)["prism"] == 2
    module.SEEN.clear()
    unwrapped = {"engine": {"chain": ["validate", "normalize", "prism"], "blocked": ["timing"]}}
    plain = run_order(start_host(LabConfig.model_validate(unwrapped)), order_dict)
    # Identical but for the config fingerprint, which includes engine.blocked.
    assert wrapped.pop("engine")["config_sha256"] != plain.pop("engine")["config_sha256"]
    assert wrapped == plain and module.SEEN == []


OBSERVER = '''
from lenslane import hookimpl

RESULTS = []

@hookimpl
def lenslane_result_ready(order_id, result):
    RESULTS.append((order_id, result))
    result["status"] = "tampered"  # a copy: the published result must not change
'''


def test_result_ready_observes_the_exact_result_and_cannot_change_it(install_plugin, order_dict):
    import importlib

    module = importlib.import_module(install_plugin("observer", OBSERVER))
    host = start_host(LabConfig.model_validate({"engine": {"chain": ["normalize"]}}))
    result = run_order(host, order_dict)
    [(order_id, seen)] = module.RESULTS
    assert order_id == "TST-0001" and result["status"] == "ready"
    assert {k: v for k, v in seen.items() if k != "status"} == {k: v for k, v in result.items() if k != "status"}


CONFIGURED = '''
from pydantic import BaseModel, ConfigDict
from lenslane import hookimpl

class Settings(BaseModel):
    model_config = ConfigDict(extra="forbid")
    queue: str = "held-orders"

SETTINGS = []

@hookimpl
def lenslane_configure(settings):
    SETTINGS.append(Settings.model_validate(settings))
'''


def test_configure_receives_the_plugins_own_table_at_start(install_plugin):
    import importlib

    module = importlib.import_module(install_plugin("notify", CONFIGURED))
    start_host(LabConfig.model_validate({"plugins": {"notify": {"queue": "lab-2"}}}))
    start_host(LabConfig())  # no table: the plugin's defaults
    assert [s.queue for s in module.SETTINGS] == ["lab-2", "held-orders"]


def test_configure_refusing_its_table_stops_the_engine_with_the_key(install_plugin):
    install_plugin("notify", CONFIGURED)
    with pytest.raises(ConfigError, match=r"plugins\.notify\.queu: Extra inputs are not permitted"):
        start_host(LabConfig.model_validate({"plugins": {"notify": {"queu": "lab-2"}}}))


def test_a_plugins_table_for_no_plugin_or_a_plugin_without_settings_stops_the_engine(install_plugin):
    install_plugin("observer", OBSERVER)
    with pytest.raises(ConfigError, match=r"plugins\.nosuch: no plugin is named 'nosuch'"):
        start_host(LabConfig.model_validate({"plugins": {"nosuch": {"a": 1}}}))
    with pytest.raises(ConfigError, match=r"plugins\.observer: plugin 'observer' .* takes no settings"):
        start_host(LabConfig.model_validate({"plugins": {"observer": {"a": 1}}}))


HOOK_TESTS = {
    "lenslane_stages": [test_stages_from_a_plugin_run_in_the_chain_and_are_recorded,
                        test_two_plugins_providing_one_stage_name_stop_the_engine],
    "lenslane_materials": [test_materials_from_a_plugin_are_accepted_in_orders,
                           test_the_lab_config_overrides_a_plugins_material],
    "lenslane_run_stage": [test_a_run_stage_wrapper_sees_every_stage_and_changes_nothing],
    "lenslane_result_ready": [test_result_ready_observes_the_exact_result_and_cannot_change_it],
    "lenslane_configure": [test_configure_receives_the_plugins_own_table_at_start,
                           test_configure_refusing_its_table_stops_the_engine_with_the_key,
                           test_a_plugins_table_for_no_plugin_or_a_plugin_without_settings_stops_the_engine],
}


# --------------------------------------------------------------------------
# Every hook documented and tested
# --------------------------------------------------------------------------


def test_every_hook_has_a_registered_test():
    specs = hook_specs()
    assert specs, "no hookspecs found"
    untested = sorted(set(specs) - set(HOOK_TESTS))
    assert not untested, f"hooks without a test in HOOK_TESTS: {untested}"
    assert not set(HOOK_TESTS) - set(specs), "HOOK_TESTS names a hook that does not exist"
    for name, tests in HOOK_TESTS.items():
        assert tests and all(t.__name__.startswith("test_") and globals()[t.__name__] is t for t in tests), name


@pytest.mark.parametrize("name", sorted(hook_specs()))
def test_every_hook_docstring_has_a_runnable_example(name):
    fn = hook_specs()[name]
    assert fn.__doc__ and "Example" in fn.__doc__, f"{name}: docstring without an Example"
    examples = doctest.DocTestParser().get_doctest(fn.__doc__, vars(hookspecs).copy(), name, None, 0)
    assert examples.examples, f"{name}: the Example has no >>> lines"
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS)
    runner.run(examples)
    assert runner.failures == 0, f"{name}: the docstring example fails"


@pytest.mark.parametrize("name", sorted(hook_specs()))
def test_every_hook_has_a_section_with_its_exact_signature_in_developers_md(name):
    section = developers_section(name)
    assert signature_line(hook_specs()[name]) in section
    for heading in ("**When:**", "**Arguments:**", "**Return:**", "**Not called**"):
        assert heading in section, f"{name}: DEVELOPERS.md section lacks {heading}"


def _registered(pm: pluggy.PluginManager, code: str) -> types.ModuleType:
    module = types.ModuleType("developers_md_example")
    exec(compile(code, "DEVELOPERS.md", "exec"), module.__dict__)
    pm.register(module)
    return module


@pytest.mark.parametrize("name", sorted(hook_specs()))
def test_every_hook_example_in_developers_md_runs(name):
    blocks = re.findall(r"```python\n(.*?)```", developers_section(name), re.S)
    assert blocks, f"{name}: DEVELOPERS.md section has no python example"
    from lenslane.chain import core

    pm = pluggy.PluginManager(hookspecs.PROJECT)
    pm.add_hookspecs(hookspecs)
    pm.register(core)
    module = _registered(pm, blocks[0])
    assert hasattr(getattr(module, name), f"{hookspecs.PROJECT}_impl"), f"{name}: example is not a hookimpl"
    pm.check_pending()
    # Call the hook the way the engine does, with keyword arguments.
    stage = Stage(name="probe", run=lambda view, params: [Flag("probe", "info", "ran")])
    calls = {
        "lenslane_stages": lambda: [s for batch in pm.hook.lenslane_stages() for s in batch],
        "lenslane_materials": lambda: pm.hook.lenslane_materials(),
        "lenslane_run_stage": lambda: pm.hook.lenslane_run_stage(stage=stage, view=None, params=None),
        "lenslane_result_ready": lambda: pm.hook.lenslane_result_ready(
            order_id="TST-0001", result={"status": "review", "order_id": "TST-0001"}),
        "lenslane_configure": lambda: pm.hook.lenslane_configure(settings={"queue": "lab-2"}),
    }
    assert name in calls, f"{name}: add a call for the new hook here"
    outcome = calls[name]()
    if name == "lenslane_stages":
        assert all(isinstance(s, Stage) for s in outcome) and outcome
    elif name == "lenslane_materials":
        assert all(set(values) == {"index", "abbe", "density"} for entry in outcome for values in entry.values())
    elif name == "lenslane_run_stage":
        assert [p.code for p in outcome] == ["probe"]
    elif name == "lenslane_configure":
        assert module.SETTINGS["current"].queue == "lab-2"
    else:
        assert module.HELD == ["TST-0001"]


ODD_PROPOSAL = '''
from lenslane import Stage, hookimpl

@hookimpl
def lenslane_stages():
    return [Stage(name="odd", run=lambda view, params: ["lenses.right.surfacing = -9"])]
'''


def test_a_stage_proposing_anything_but_change_or_flag_fails_the_order(install_plugin, order_dict):
    install_plugin("odd", ODD_PROPOSAL)
    host = start_host(LabConfig.model_validate({"engine": {"chain": ["normalize", "odd"]}}))
    with pytest.raises(StageFailure, match="neither a Change nor a Flag") as failure:
        run_order(host, order_dict)
    assert failure.value.stage == "odd"
