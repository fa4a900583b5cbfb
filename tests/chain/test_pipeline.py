"""The plugin host and the pipeline: chain from the config, proposals applied and recorded, faults contained."""
from __future__ import annotations

import re

import pytest

from lenslane import Change, Flag, Stage, hookimpl
from lenslane.config import ConfigError, parse_config
from lenslane.chain.host import PluginError, start_host
from lenslane.chain.pipeline import StageFailure
from tests.conftest import run_order


def host_with(toml: str = "", **plugins):
    return start_host(parse_config(toml), plugins=plugins)


class NoteStage:
    """An inline plugin providing a stage that writes one lab field and raises one flag."""

    def __init__(self, name="note", writes=("lenses.*.lab",), level="info", field="lenses.{eye}.lab.note"):
        self.name, self.writes, self.level, self.field = name, writes, level, field
        self.calls = 0

    def run(self, view, params):
        self.calls += 1
        for eye in view.eyes:
            yield Change(self.field.format(eye=eye), "checked", "The lab notes the order was checked.",
                         "test note", "Common practice", {"eye": eye})
        yield Flag("note", self.level, "A note for the lab.")

    @hookimpl
    def lenslane_stages(self):
        return [Stage(self.name, self.run, writes=self.writes)]


def chain_with(*extra):
    stages = ", ".join(f'"{s}"' for s in ("validate", "normalize", "prism", *extra))
    return f"[engine]\nchain = [{stages}]\n"


def test_every_changed_field_has_a_change_record(order_dict):
    stage = NoteStage()
    result = run_order(host_with(chain_with("note"), note=stage), order_dict)
    recorded = {c["field"] for c in result["changes"]}
    for eye, lens in result["lenses"].items():
        for part, value in lens.items():
            if isinstance(value, dict) and part == "lab":
                assert all(f"lenses.{eye}.lab.{k}" in recorded for k in value)
            else:
                assert f"lenses.{eye}.{part}" in recorded
    note = [c for c in result["changes"] if c["stage"] == "note"][0]
    assert note["before"] is None and note["after"] == "checked"
    assert note["reason"] and note["method"] and note["source"]


class Overwrite(NoteStage):
    """Writes ``value`` to ``lenses.<eye>.surfacing.<key>`` (or to the whole power when ``key`` is None)."""

    def __init__(self, value, key=None):
        super().__init__(name="overwrite", writes=("lenses.*.surfacing",))
        self.value, self.key = value, key

    def run(self, view, params):
        for eye in view.eyes:
            field = f"lenses.{eye}.surfacing" + (f".{self.key}" if self.key else "")
            yield Change(field, self.value, "Overwrites the power.", "test", "Common practice")


def test_a_change_records_the_value_before_and_after(order_dict):
    power = {"sphere": -1.254, "cylinder": -0.5, "axis": 90}
    result = run_order(host_with(chain_with("overwrite"), overwrite=Overwrite(power)), order_dict)
    last = [c for c in result["changes"] if c["stage"] == "overwrite" and c["field"] == "lenses.right.surfacing"][0]
    assert last["before"] == {"sphere": -1.0, "cylinder": -0.5, "axis": 90}
    assert last["after"] == {"sphere": -1.25, "cylinder": -0.5, "axis": 90}


@pytest.mark.parametrize("value, key, problem", [
    ("abc", "sphere", r"lenses\.right\.surfacing\.sphere: Input should be a valid number"),
    (float("nan"), "sphere", r"wrote nan to lenses\.right\.surfacing\.sphere: not a finite number"),
    (float("inf"), "cylinder", r"wrote inf to lenses\.right\.surfacing\.cylinder: not a finite number"),
    (-80.0, "sphere", r"lenses\.right\.surfacing\.sphere: Input should be greater than or equal to -50"),
    (0, "axis", r"lenses\.right\.surfacing\.axis: Input should be greater than or equal to 1"),
    ({1, 2}, "sphere", r"wrote a set to lenses\.right\.surfacing\.sphere: not a JSON value"),
    (float("nan"), "axis", r"wrote nan to lenses\.right\.surfacing\.axis: not a finite number"),
    (float("-inf"), "axis", r"wrote -inf to lenses\.right\.surfacing\.axis: not a finite number"),
    ({"sphere": -1.0, "cylinder": float("nan"), "axis": 90}, None,
     r"wrote nan to lenses\.right\.surfacing\.cylinder: not a finite number"),
    ({"sphere": -1.0, "cylinder": 0.0, "axis": 90, 7: 1}, None,
     r"wrote a key 7 to lenses\.right\.surfacing: keys must be strings"),
    ({"sphere": [object()], "cylinder": 0.0, "axis": 90}, None,
     r"wrote a object to lenses\.right\.surfacing\.sphere\[0\]: not a JSON value"),
    ({"sphere": "-1.00", "cylinder": 0.0, "axis": 90}, None,
     r"lenses\.right\.surfacing\.sphere: Input should be a valid number"),
    ({"sphere": -1.0}, None, r"lenses\.right\.surfacing\.cylinder: Field required"),
])
def test_a_value_the_result_contract_refuses_fails_the_order_naming_the_stage(order_dict, value, key, problem):
    # ORDER_FORMAT.md: a power is a number in dioptres, the axis a whole degree 1–180; JSON has no NaN.
    with pytest.raises(StageFailure, match=problem) as caught:
        run_order(host_with(chain_with("overwrite"), overwrite=Overwrite(value, key)), order_dict)
    assert caught.value.stage == "overwrite" and caught.value.field == "(stage overwrite)"


@pytest.mark.parametrize("value, problem", [
    (True, r"lenses\.right\.surfacing\.sphere: Input should be a valid number \(got True\)"),
    ("-8.00", r"lenses\.right\.surfacing\.sphere: Input should be a valid number \(got '-8\.00'\)"),
])
def test_a_wrong_value_is_refused_as_it_is_set_not_computed_with_by_the_next_stage(order_dict, value, problem):
    # ORDER_FORMAT.md: a power is a number. A boolean written where a power goes must not be read as 1 D by the
    # stages after it (and published as a power they computed from it), nor a text blamed on the stage that
    # tripped over it: the order is refused naming the stage that wrote it.
    chain = '[engine]\nchain = ["validate", "normalize", "overwrite", "vertex", "tilt", "generator", "geometry", "safety"]\n'
    order_dict["rx"] = {"right": {"sphere": -8.0}, "vertex_mm": 12.0}  # fitted at 14 mm: vertex recomputes the power
    order_dict["fit"]["vertex_mm"] = 14.0
    with pytest.raises(StageFailure, match=problem) as caught:
        run_order(host_with(chain, overwrite=Overwrite(value, "sphere")), order_dict)
    assert caught.value.stage == "overwrite"


@pytest.mark.parametrize("writes", [("status",), ("lenses.*",), ("lenses.middle.rx",), ("order.rx",)])
def test_a_stage_declaring_it_writes_outside_the_lenses_stops_the_start(writes):
    # A stage may write only the lenses' fields (DEVELOPERS.md, the result contract): a declaration that could
    # never be honoured is refused when the engine starts, not by failing every order.
    with pytest.raises(PluginError, match=rf"stage 'odd' declares it writes {re.escape(repr(writes[0]))}; a stage "
                                          r"writes only fields of the lenses"):
        host_with(odd=NoteStage(name="odd", writes=writes))


def test_a_result_missing_what_the_contract_requires_fails_without_blaming_a_stage(order_dict):
    # A chain without normalize writes no rx or surfacing, which every published lens must have.
    with pytest.raises(StageFailure, match=r"lenses\.right\.rx: Field required; no stage of the chain wrote it") as caught:
        run_order(host_with('[engine]\nchain = ["validate"]\n'), order_dict)
    assert caught.value.field == "(result)" and caught.value.stage is None


def test_a_nan_in_a_lab_field_or_in_flag_values_is_refused(order_dict):
    # The result model lets a lab keep its own fields (lenses.<eye>.lab…); they must still be JSON numbers.
    lab_nan = NoteStage(name="labnan", field="lenses.{eye}.lab.note")
    lab_nan.run = lambda view, params: [Change("lenses.right.lab.seal_mm", float("nan"), "r", "m", "s")]
    with pytest.raises(StageFailure, match="not a finite number"):
        run_order(host_with(chain_with("labnan"), labnan=lab_nan), order_dict)

    flagging = NoteStage(name="flagging")
    flagging.run = lambda view, params: [Flag("odd", "info", "m", values={"gap_mm": float("-inf")})]
    with pytest.raises(StageFailure, match="flag 'odd' values.gap_mm: not a finite number"):
        run_order(host_with(chain_with("flagging"), flagging=flagging), order_dict)


class WithInputs(NoteStage):
    """Writes a plain lab note with the given ``inputs``."""

    def __init__(self, inputs):
        super().__init__(name="inputs")
        self.inputs = inputs

    def run(self, view, params):
        yield Change("lenses.right.lab.note", "checked", "r", "m", "s", self.inputs)


@pytest.mark.parametrize("inputs, problem", [
    ({"gap_mm": float("nan")}, r"wrote nan to lenses\.right\.lab\.note \(inputs\)\.gap_mm: not a finite number"),
    ({"gaps": [1.0, float("inf")]}, r"wrote inf to lenses\.right\.lab\.note \(inputs\)\.gaps\[1\]: not a finite number"),
    ({"by": {("a", 1): 2.0}}, r"wrote a key \('a', 1\) to lenses\.right\.lab\.note \(inputs\)\.by: keys must be strings"),
    ({"when": b"2026"}, r"wrote a bytes to lenses\.right\.lab\.note \(inputs\)\.when: not a JSON value"),
])
def test_inputs_that_are_not_plain_json_fail_the_order_naming_the_stage(order_dict, inputs, problem):
    with pytest.raises(StageFailure, match=problem) as caught:
        run_order(host_with(chain_with("inputs"), inputs=WithInputs(inputs)), order_dict)
    assert caught.value.stage == "inputs"


def test_subclasses_of_the_json_types_are_json_and_a_tuple_is_an_array(order_dict):
    # An IntEnum is an int and numpy's float64 a float (plugins compute with numpy); a tuple is written as a
    # JSON array, its numbers rounded like a list's (lengths to 0.1 mm).
    import enum

    import numpy as np

    class Grade(enum.IntEnum):
        FINE = 2

    class Values(NoteStage):
        def run(self, view, params):
            yield Change("lenses.right.lab", {"grade": Grade.FINE, "seal_mm": np.float64(1.04), "pads_mm": (1.26, 2.0)},
                         "r", "m", "s", {"spread_mm": (0.5, np.float64(0.25))})
            yield Flag("noted", "info", "m", values={"seal_mm": np.float64(1.04)})

    result = run_order(host_with(chain_with("values"), values=Values(name="values")), order_dict)
    [change] = [c for c in result["changes"] if c["stage"] == "values"]
    assert change["after"] == {"grade": 2, "seal_mm": 1.0, "pads_mm": [1.3, 2.0]}
    assert change["inputs"] == {"spread_mm": [0.5, 0.25]}
    assert result["lenses"]["right"]["lab"] == change["after"]
    assert [f["values"] for f in result["flags"] if f["code"] == "noted"] == [{"seal_mm": 1.0}]


def test_the_result_keeps_a_copy_of_what_a_stage_proposed(order_dict):
    # A later write inside an object the stage proposed changes the result's copy, never the stage's own object.
    mine = {"seal_mm": 1.0, "tag": "a"}
    inputs = {"sizes_mm": [1.0]}

    class Whole(NoteStage):
        def run(self, view, params):
            yield Change("lenses.right.lab", mine, "Sets the lab object.", "test", "Common practice", inputs)

    class Inner(NoteStage):
        def run(self, view, params):
            yield Change("lenses.right.lab.seal_mm", 2.0, "Sets one key in it.", "test", "Common practice")

    host = host_with(chain_with("whole", "inner"), whole=Whole(name="whole"), inner=Inner(name="inner"))
    result = run_order(host, order_dict)
    assert result["lenses"]["right"]["lab"]["seal_mm"] == 2.0
    assert mine == {"seal_mm": 1.0, "tag": "a"}
    inputs["sizes_mm"].append(2.0)
    assert [c["inputs"] for c in result["changes"] if c["stage"] == "whole"] == [{"sizes_mm": [1.0]}]


def test_a_later_write_inside_an_object_leaves_the_earlier_record_as_it_was(order_dict):
    # Each record's "after" is the value as set then, even when a later stage sets one key inside it;
    # the result's lenses hold both, rounded to the contract's precision (lengths to 0.1 mm).
    class Whole(NoteStage):
        def run(self, view, params):
            yield Change("lenses.right.lab", {"seal_mm": 1.04, "tag": "a"}, "Sets the lab object.", "test",
                         "Common practice")

    class Inner(NoteStage):
        def run(self, view, params):
            yield Change("lenses.right.lab.seal_mm", 2.26, "Sets one key in it.", "test", "Common practice")

    host = host_with(chain_with("whole", "inner"), whole=Whole(name="whole"), inner=Inner(name="inner"))
    result = run_order(host, order_dict)
    whole, inner = [c for c in result["changes"] if c["field"].startswith("lenses.right.lab")]
    assert whole["after"] == {"seal_mm": 1.0, "tag": "a"}
    assert inner["before"] == 1.0 and inner["after"] == 2.3
    assert result["lenses"]["right"]["lab"] == {"seal_mm": 2.3, "tag": "a"}


def test_a_stage_that_raises_fails_the_order_with_its_name(order_dict):
    class Broken:
        @hookimpl
        def lenslane_stages(self):
            def run(view, params):
                raise ZeroDivisionError("no power")
            return [Stage("broken", run)]

    with pytest.raises(StageFailure) as caught:
        run_order(host_with(chain_with("broken"), broken=Broken()), order_dict)
    assert caught.value.stage == "broken"
    assert "ZeroDivisionError: no power" in caught.value.message


def test_a_disabled_stage_is_not_called(order_dict):
    stage = NoteStage()
    host = host_with(chain_with("note") + "[stages.note]\nenabled = false\n", note=stage)
    result = run_order(host, order_dict)
    assert stage.calls == 0
    assert "note" not in result["engine"]["stages"]
    assert host.disabled == ["note"]


def test_a_stage_left_out_of_the_chain_is_not_called(order_dict):
    stage = NoteStage()
    run_order(host_with(chain_with(), note=stage), order_dict)
    assert stage.calls == 0


def test_a_blocked_plugin_is_not_loaded():
    host = host_with('[engine]\nblocked = ["prism"]\nchain = ["validate", "normalize"]\n')
    assert "prism" not in host.stages
    assert host.plugin_manager.is_blocked("prism")


def test_a_chained_blocked_stage_fails_at_start():
    with pytest.raises(ConfigError, match=r"engine.chain\[2\].*blocked"):
        host_with('[engine]\nblocked = ["prism"]\nchain = ["validate", "normalize", "prism"]\n')


def test_a_write_outside_the_declared_fields_is_refused(order_dict):
    sneaky = NoteStage(name="sneaky", writes=("lenses.*.lab",), field="lenses.{eye}.surfacing")
    with pytest.raises(StageFailure, match="may not write 'lenses.right.surfacing'"):
        run_order(host_with(chain_with("sneaky"), sneaky=sneaky), order_dict)


def test_a_write_for_an_eye_not_made_is_refused(order_dict):
    del order_dict["rx"]["left"]
    del order_dict["fit"]["left"]
    sneaky = NoteStage(name="sneaky", field="lenses.left.lab.note")
    with pytest.raises(StageFailure, match="not a field of an eye being made"):
        run_order(host_with(chain_with("sneaky"), sneaky=sneaky), order_dict)


def test_a_review_flag_holds_the_order(order_dict):
    result = run_order(host_with(chain_with("note"), note=NoteStage(level="review")), order_dict)
    assert result["status"] == "review"
    result = run_order(host_with(chain_with("note"), note=NoteStage(level="warning")), order_dict)
    assert result["status"] == "ready"


def test_a_flag_of_unknown_level_fails_the_order(order_dict):
    with pytest.raises(StageFailure, match="level 'urgent'"):
        run_order(host_with(chain_with("note"), note=NoteStage(level="urgent")), order_dict)


def test_a_stage_sees_a_copy_not_the_result(order_dict):
    class Meddler:
        @hookimpl
        def lenslane_stages(self):
            def run(view, params):
                view.get("lenses.right.surfacing")["sphere"] = 99.0
                return []
            return [Stage("meddler", run)]

    result = run_order(host_with(chain_with("meddler"), meddler=Meddler()), order_dict)
    assert result["lenses"]["right"]["surfacing"]["sphere"] == -1.0


def test_the_order_model_is_frozen(order_dict):
    class Meddler:
        @hookimpl
        def lenslane_stages(self):
            def run(view, params):
                view.order.rx.right.sphere = 99.0
            return [Stage("meddler", run)]

    with pytest.raises(StageFailure, match="frozen"):
        run_order(host_with(chain_with("meddler"), meddler=Meddler()), order_dict)


def test_stage_parameters_come_from_the_config_and_are_validated():
    host = host_with("[stages.validate]\npd_asymmetry_mm = 2.5\n")
    link = [l for l in host.chain if l.stage.name == "validate"][0]
    assert link.params.pd_asymmetry_mm == 2.5
    with pytest.raises(ConfigError, match=r"stages\.validate\.pd_asymmetry_mm"):
        host_with("[stages.validate]\npd_asymmetry_mm = -1.0\n")
    with pytest.raises(ConfigError, match=r"stages\.validate\.pd_asymetry_mm.*Extra inputs"):
        host_with("[stages.validate]\npd_asymetry_mm = 2.0\n")


@pytest.mark.parametrize("toml, where", [
    ('[engine]\nchain = ["validate", "nosuch"]\n', r"engine\.chain\[1\]: no such stage 'nosuch'"),
    ('[engine]\nchain = ["validate", "validate"]\n', r"engine\.chain\[1\]: stage 'validate' is listed twice"),
    ('[engine]\ncylinder_form = "sideways"\n', r"engine\.cylinder_form"),
    ('[engine]\nunknown = 1\n', r"engine\.unknown"),
    ('[watch]\nrescan_seconds = 0\n', r"watch\.rescan_seconds"),
    ('[materials."resin-x"]\nindex = 3.0\nabbe = 40\ndensity = 1.2\n', r"materials\.resin-x\.index"),
    ('[stages.nosuch]\nx = 1\n', r"stages\.nosuch: no such stage"),
    ('[stages.validate]\nenabled = "yes"\n', r"stages\.validate\.enabled"),
    ("[engine\n", r"not valid TOML"),
    ('[engine]\nblocked = ["core"]\n', r"engine\.blocked"),
])
def test_a_bad_config_fails_at_start_with_the_key_path(toml, where):
    with pytest.raises(ConfigError, match=where):
        host_with(toml)


def test_the_config_fingerprint_follows_the_effective_values_not_the_comments():
    a = host_with("# a comment\n[stages.validate]\npd_asymmetry_mm = 4.0\n")
    b = host_with("")
    c = host_with("[stages.validate]\npd_asymmetry_mm = 3.0\n")
    assert a.config_sha256 == b.config_sha256 != c.config_sha256


def test_a_lab_material_overrides_the_builtin_table():
    host = host_with('[materials."resin-1.50"]\nindex = 1.500\nabbe = 58\ndensity = 1.31\n')
    assert host.settings.materials["resin-1.50"].index == 1.500
    assert host.settings.materials["resin-1.74"].index == 1.740


def test_the_run_stage_hook_wraps_every_stage(order_dict):
    seen = []

    class Timer:
        @hookimpl(wrapper=True)
        def lenslane_run_stage(self, stage, view, params):
            seen.append(stage.name)
            return (yield)

    result = run_order(host_with(timer=Timer()), order_dict)
    assert seen == result["engine"]["stages"]


def test_tracing_prints_each_hook_call(order_dict, capsys):
    host = start_host(parse_config(""), trace=True)
    run_order(host, order_dict)
    err = capsys.readouterr().err
    assert "[hook] lenslane_run_stage" in err and "normalize" in err
