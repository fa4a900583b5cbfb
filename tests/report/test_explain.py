"""``lenslane explain LAB ORDER_ID``: the story of one order, from the audit log alone."""
from __future__ import annotations

import copy
import hashlib
import json

import pytest

from lenslane.cli import main
from lenslane.report.notation import geometry_text, power_text, prism_text
from lenslane.vocabulary import CAUTION

MINUS = "\u2212"  # Source: Unicode U+2212 MINUS SIGN, the sign printed in the trade's notation


def explain(lab, order_id, capsys, *flags):
    code = main(["explain", str(lab.root), order_id, *flags])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


@pytest.fixture
def compensated(order_dict):
    """An order whose frame sits 2 mm farther from the eye than the refraction, with prescribed prism."""
    order = copy.deepcopy(order_dict)
    order["order_id"] = "CMP-0001"
    order["rx"] = {"right": {"sphere": -8.00, "prism": [{"amount": 1.0, "base": "in"}, {"amount": 0.5, "base": "up"}]},
                   "left": {"sphere": -4.25, "cylinder": -1.25, "axis": 170},
                   "vertex_mm": 12.0}
    order["fit"]["vertex_mm"] = 14.0
    return order


def test_html_with_json_or_config_is_refused(busy_lab, capsys, tmp_path):
    for flag in ("--json", "--config"):
        code, out, err = explain(busy_lab, "TST-0001", capsys, "--html", str(tmp_path / "page.html"), flag)
        assert code == 2 and out == "" and "--html writes the order page" in err
    assert not (tmp_path / "page.html").exists()


def test_an_unknown_order_is_said_to_be_unknown(busy_lab, capsys):
    code, out, err = explain(busy_lab, "NOPE-1", capsys)
    assert code == 1 and out == ""
    assert err.splitlines() == [f"lenslane: order NOPE-1 is not in the audit log of {busy_lab.root}", CAUTION]
    code, out, _ = explain(busy_lab, "NOPE-1", capsys, "--json")
    assert code == 1 and json.loads(out)["found"] is False and json.loads(out)["processings"] == []


def test_explain_tells_what_arrived(make_lab, drop, compensated, capsys):
    lab = make_lab()
    data = drop(lab, compensated)
    lab.drain()
    code, out, _ = explain(lab, "CMP-0001", capsys)
    assert code == 0
    # Source: FIPS 180-4 SHA-256 of the bytes as dropped (hashlib).
    assert f"Arrived:  CMP-0001.json, {len(data)} bytes, sha256 {hashlib.sha256(data).hexdigest()}, recorded 20" in out
    assert "Processed once." in out


def test_explain_shows_the_prescription_and_the_compensated_surfacing(make_lab, drop, compensated, capsys):
    lab = make_lab()
    drop(lab, compensated)
    lab.drain()
    code, out, _ = explain(lab, "CMP-0001", capsys)
    assert code == 0
    # The prescription as received, in the trade's notation.
    assert f"lenses.right.rx: (not set) → {MINUS}8.00 DS" in out
    assert f"lenses.left.rx: (not set) → {MINUS}4.25 {MINUS}1.25 × 170" in out
    # Computed from the published vergence formula F' = F / (1 − d F), d = (12 − 14) mm = −0.002 m
    # (Jalie, The Principles of Ophthalmic Lenses), per principal meridian:
    #   −8.00 / (1 − 0.016) = −8.1301;  −4.25 / 0.9915 = −4.2864;
    #   −5.50 / 0.989 = −5.5612, so the cylinder is −5.5612 − (−4.2864) = −1.2747.
    assert f"lenses.right.surfacing: {MINUS}8.00 DS → {MINUS}8.13 DS" in out
    assert f"lenses.left.surfacing: {MINUS}4.25 {MINUS}1.25 × 170 → {MINUS}4.29 {MINUS}1.27 × 170" in out
    # Computed from the vector resultant √(1.0² + 0.5²) = 1.118 Δ at atan2(0.5, 1.0) = 26.57° (contract example).
    assert "lenses.right.prism: (not set) → 1.12Δ base 26.6°" in out
    final = out.split("Final lens:")[1]
    assert f"right  rx         {MINUS}8.00 DS" in final
    assert f"surfacing  {MINUS}8.13 DS" in final and f"surfacing  {MINUS}4.29 {MINUS}1.27 × 170" in final
    assert "Outcome:  published, status " in out
    assert out.rstrip().endswith(CAUTION)


def test_each_change_says_why_with_its_inputs_units_method_and_source(make_lab, drop, compensated, capsys):
    lab = make_lab()
    drop(lab, compensated)
    lab.drain()
    out = explain(lab, "CMP-0001", capsys)[1]
    chain = out.split("Chain:    ")[1].splitlines()[0].split(" → ")
    stage_lines = [line for line in out.splitlines() if line.startswith("Stage ")]
    assert [line.split(": ", 1)[1].split(" ")[0].rstrip(";") for line in stage_lines] == chain
    lines = out.splitlines()
    start = [i for i, line in enumerate(lines) if line.startswith("Stage ") and ": vertex" in line][0]
    end = next(i for i in range(start + 1, len(lines)) if not lines[i].startswith(" "))
    vertex = "\n".join(lines[start:end])
    assert "12.0 mm" in vertex and "14.0 mm" in vertex  # both vertex distances, with units
    assert "      why:    " in vertex and " — source: " in vertex


def test_explain_json_gives_the_same_story_as_data(make_lab, drop, compensated, capsys):
    lab = make_lab()
    drop(lab, compensated)
    lab.drain()
    code, out, _ = explain(lab, "CMP-0001", capsys, "--json")
    story = json.loads(out)
    assert code == 0 and story["found"] and story["caution"] == CAUTION
    [processing] = story["processings"]
    assert processing["lenses"]["right"]["surfacing"]["sphere"] == -8.13
    assert processing["lenses"]["left"]["surfacing"] == {"sphere": -4.29, "cylinder": -1.27, "axis": 170}
    assert processing["prescription"]["right"] == processing["lenses"]["right"]["rx"]
    vertex = [s for s in processing["stages"] if s["stage"] == "vertex"][0]
    change = [c for c in vertex["changes"] if c["field"] == "lenses.right.surfacing"][0]
    assert (change["before"]["sphere"], change["after"]["sphere"]) == (-8.0, -8.13)
    assert change["method"] and change["source"]
    assert processing["outcome"]["event"] == "published"
    published = (lab.outbox / "CMP-0001.json").read_bytes()
    assert processing["outcome"]["result_sha256"] == hashlib.sha256(published).hexdigest()


def test_explain_reads_the_log_when_the_outbox_is_gone(make_lab, drop, compensated, capsys):
    lab = make_lab()
    drop(lab, compensated)
    lab.drain()
    (lab.outbox / "CMP-0001.json").unlink()
    code, out, _ = explain(lab, "CMP-0001", capsys)
    assert code == 0 and f"surfacing  {MINUS}8.13 DS" in out
    assert "no longer in outbox/" in out


def test_a_result_waiting_for_a_person_is_told_where_it_waits(make_lab, drop, capsys):
    from tests.decide.helpers import review_order

    lab = make_lab()
    drop(lab, review_order("RV-0001"))
    lab.drain()
    code, out, _ = explain(lab, "RV-0001", capsys)
    assert code == 0 and "review/RV-0001.json" in out and "still in review/, unchanged" in out
    assert "outbox" not in out.split("Result:", 1)[1].splitlines()[0]


def test_an_order_processed_twice_is_told_twice(make_lab, drop, compensated, capsys):
    lab = make_lab()
    drop(lab, compensated, "first.json")
    lab.drain()
    drop(lab, compensated, "again.json")
    lab.drain()
    code, out, _ = explain(lab, "CMP-0001", capsys)
    assert code == 0 and "Processed 2 times; each is told below, oldest first." in out
    assert "== Processing 1 of 2" in out and "== Processing 2 of 2" in out
    assert out.index("Arrived:  first.json") < out.index("Arrived:  again.json")
    # Each pass is told with the outcome the log recorded for it.
    records = [json.loads(line) for line in (lab.root / "audit.jsonl").read_text(encoding="utf-8").splitlines()]
    outcomes = [r["event"] for r in records if r["event"] in ("published", "rejected", "held", "skipped")]
    assert outcomes[0] == "published" and len(outcomes) == 2
    second = out.split("== Processing 2 of 2")[1]
    assert "not recorded" not in second and f"Outcome:  {outcomes[1]}" in second


def test_a_rejected_order_is_told_with_its_reasons(make_lab, drop, order_dict, capsys):
    lab = make_lab()
    order = copy.deepcopy(order_dict)
    order["order_id"] = "REJ-0001"
    order["rx"]["right"].pop("axis")  # a cylinder without its axis
    drop(lab, order)
    lab.drain()
    code, out, _ = explain(lab, "REJ-0001", capsys)
    assert code == 0
    assert "Stages:   none ran; the order was refused when it was read" in out
    assert "Outcome:  rejected, not made" in out
    assert "  rx.right.axis: required when cylinder is not zero" in out


def test_flags_are_told_with_what_to_decide(make_lab, drop, order_dict, capsys):
    lab = make_lab()
    order = copy.deepcopy(order_dict)
    order["order_id"] = "FLG-0001"
    order["lens"]["design"] = "progressive"
    order["rx"]["right"]["add"] = order["rx"]["left"]["add"] = 2.0
    order["fit"]["right"]["height_mm"] = 12.0  # too little room below the fitting point for a corridor
    drop(lab, order)
    lab.drain()
    out = explain(lab, "FLG-0001", capsys)[1]
    assert "[review] fitting-height-low (right eye, stage validate): " in out
    flag_block = out.split("[review] fitting-height-low")[1]
    assert flag_block.splitlines()[1].strip().startswith("decide: held for review")
    assert "Outcome:  published, status review" in out


# --------------------------------------------------------------------------
# The notation itself, against the contract's own examples (shared ORDER_FORMAT.md)
# --------------------------------------------------------------------------


def test_power_is_written_sphere_cylinder_times_axis():
    # Source: ORDER_FORMAT.md example: rx −4.25 −1.25 × 170 and surfacing −4.20 −1.12 × 173.
    assert power_text({"sphere": -4.25, "cylinder": -1.25, "axis": 170}) == f"{MINUS}4.25 {MINUS}1.25 × 170"
    assert power_text({"sphere": -4.2, "cylinder": -1.12, "axis": 173}) == f"{MINUS}4.20 {MINUS}1.12 × 173"
    # Common practice: plus powers carry their sign, a sphere of zero is "plano", no cylinder is "DS".
    assert power_text({"sphere": 1.0, "cylinder": 0.5, "axis": 90, "add": 2.25}) == "+1.00 +0.50 × 90 add +2.25"
    assert power_text({"sphere": 0.0, "cylinder": -0.75, "axis": 180}) == f"plano {MINUS}0.75 × 180"
    assert power_text({"sphere": -2.0, "cylinder": 0.0, "axis": 180}) == f"{MINUS}2.00 DS"


def test_prism_and_geometry_are_written_with_their_units():
    # Source: ORDER_FORMAT.md example output: prism 1.12 Δ base 26.6°, geometry of the right lens.
    assert prism_text({"amount": 1.12, "base_deg": 26.6}) == "1.12Δ base 26.6°"
    assert prism_text({"amount": 0.0, "base_deg": 0.0}) == "no prism"
    geometry = {"front_curve_d": 4.0, "center_thickness_mm": 1.0, "edge_min_mm": 3.9, "edge_max_mm": 6.8,
                "blank_min_diameter_mm": 62.0, "weight_g": 11.4}
    assert geometry_text(geometry) == ("front curve +4.00 D, centre thickness 1.0 mm, edge 3.9–6.8 mm, "
                                       "minimum blank diameter 62.0 mm, weight 11.4 g")


def test_explain_shows_the_exact_tilt_compensation_beside_martins(make_lab, drop, order_dict, capsys):
    # Source: issue 16 — each compensated lens's change record carries the as-worn residual and the value Martin's
    # formula would have given, and explain shows both.
    lab = make_lab({"stages": {"tilt": {"method": "exact"}}})
    order = copy.deepcopy(order_dict)
    order["order_id"] = "EXA-0001"
    order["rx"] = {"right": {"sphere": 5.00, "cylinder": -1.00, "axis": 80}, "left": {"sphere": 4.50}}
    order["fit"].update({"pantoscopic_deg": 12.0, "face_form_deg": 10.0})
    drop(lab, order)
    lab.drain()
    code, out, _ = explain(lab, "EXA-0001", capsys)
    assert code == 0
    compare = [line for line in out.splitlines() if "Martin's formula would give" in line]
    assert len(compare) == 2  # one per lens
    for line in compare:
        assert f"{MINUS}1" in line or "+" in line
        assert " D from the wanted power, as published (rounded) 0.0" in line
    code, out, _ = explain(lab, "EXA-0001", capsys, "--json")
    changes = [c for s in json.loads(out)["processings"][0]["stages"] for c in s["changes"]
               if c["field"].endswith("surfacing") and s["stage"] == "tilt"]
    assert all(c["inputs"]["asworn_residual_d"] < 1e-9 and "martin_surfacing" in c["inputs"] for c in changes)
    # Each lens's line gives the value its record holds, in the trade's notation.
    assert len(changes) == 2
    for change in changes:
        said = f"Martin's formula would give {power_text(change['inputs']['martin_surfacing'])}; "
        assert any(said in line for line in compare), said
