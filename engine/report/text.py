"""The story of one order as text for a person, values in the trade's notation."""
from __future__ import annotations

import json
from typing import Any

from lenslane.report.notation import inputs_text, power_text, value_text

#: What a pass that ended without publishing came to; the order page says the same.
OUTCOME_MEANINGS = {"rejected": "rejected, not made", "held": "held for a person, not processed",
                    "skipped": "skipped, already published with the same content"}
#: What a pass without a recorded outcome is; the order page says the same.
UNFINISHED = ("not recorded — the engine stopped before it finished this pass; an unfinished order is redone when "
              "the engine next starts")
#: Why no stage ran for a rejected pass; the order page says the same.
REFUSED_ON_READING = "the order was refused when it was read"


def render_text(story: dict[str, Any]) -> str:
    """The story for a person to read."""
    if not story["found"]:
        return f"order {story['order_id']} is not in the audit log of {story['lab']}"
    count = len(story["processings"])
    lines = [f"Order {story['order_id']} — from the audit log of {story['lab']}",
             "Processed once." if count == 1 else f"Processed {count} times; each is told below, oldest first."]
    decisions = list(story.get("decisions") or [])
    for number, processing in enumerate(story["processings"], start=1):
        while decisions and processing["seq"] and decisions[0]["seq"] < processing["seq"][0]:
            lines += [""] + _render_decision(decisions.pop(0))
        lines.append("")
        lines += _render_processing(processing, number, count)
    for decision in decisions:
        lines += [""] + _render_decision(decision)
    lines += ["", story["caution"]]
    return "\n".join(lines)


def _render_processing(p: dict[str, Any], index: int, count: int) -> list[str]:
    seq = p["seq"]
    lines = [f"== Processing {index} of {count} (audit records seq {seq[0]}–{seq[1]}) =="]
    received = p["received"]
    if received:
        lines.append(f"Arrived:  {received['file']}, {received['size']} bytes, sha256 {received['sha256']}, "
                     f"recorded {received['recorded_at']}")
        sender = [f"{label} {received[key]}" for key, label in (("account", "account"), ("wearer_ref", "wearer"),
                                                                ("placed_at", "placed at")) if received.get(key)]
        if sender:
            lines.append("From:     " + ", ".join(sender))
    else:
        lines.append("Arrived:  (the record of its arrival is not in the log)")
    engine = p["engine"]
    if engine["version"]:
        lines.append(f"Engine:   lenslane {engine['version']}, config sha256 {engine['config_sha256']}")
    if engine["stages"]:
        lines.append("Chain:    " + " → ".join(engine["stages"]))
    for plugin in engine["hooks"]:
        lines.append(f"Hooks:    {plugin['plugin']} ({plugin['distribution']} {plugin['version']}): "
                     + ", ".join(plugin["hooks"]))
    if p["stages"]:
        lines += _render_stages(p["stages"])
    elif p["outcome"]["event"] == "rejected":
        lines.append(f"Stages:   none ran; {REFUSED_ON_READING}")
    elif p["outcome"]["event"] in ("held", "skipped"):
        lines.append("Stages:   none ran; see the outcome")
    lines += _render_flags(p["flags"])
    if p["lenses"]:
        lines.append("Final lens:")
        for eye, parts in p["lenses"].items():
            for position, (part, value) in enumerate(parts.items()):
                lines.append(f"  {eye if position == 0 else '':<6} {part:<10} {value_text(part, value)}")
    lines += _render_outcome(p["outcome"])
    return lines


def _render_stages(stages: list[dict[str, Any]]) -> list[str]:
    lines = []
    for position, stage in enumerate(stages, start=1):
        codes = list(dict.fromkeys(stage["flags"]))
        counted = [f"{code} ×{stage['flags'].count(code)}" if stage["flags"].count(code) > 1 else code
                   for code in codes]
        raised = f"; raised {', '.join(counted)} (see Flags)" if codes else ""
        made_by = stage["made_by"]
        by = f" ({made_by['distribution']} {made_by['version']})" if made_by else ""
        if not stage["changes"]:
            lines.append(f"Stage {position} of {len(stages)}: {stage['stage']}{by} — changed nothing{raised}")
            continue
        lines.append(f"Stage {position} of {len(stages)}: {stage['stage']}{by}{raised}")
        for change in stage["changes"]:
            field = change["field"]
            lines.append(f"  {field}: {value_text(field, change['before'])} → {value_text(field, change['after'])}")
            lines.append(f"      why:    {change['reason']}")
            lines.append(f"      inputs: {inputs_text(change['inputs'])}")
            lines.append(f"      method: {change['method']} — source: {change['source']}")
            inputs = change["inputs"]
            if "martin_surfacing" in inputs and "asworn_residual_d" in inputs:
                lines.append(f"      compare: Martin's formula would give {power_text(inputs['martin_surfacing'])}; "
                             f"traced as worn, the solved lens is {inputs['asworn_residual_d']:.1e} D from the wanted "
                             f"power, as published (rounded) {inputs['published_asworn_residual_d']:.3f} D")
    return lines


def _render_flags(flags: list[dict[str, Any]]) -> list[str]:
    if not flags:
        return ["Flags:    none"]
    lines = [f"Flags ({len(flags)}):"]
    for flag in flags:
        eye = f"{flag['eye']} eye" if flag["eye"] else "both eyes"
        lines.append(f"  [{flag['level']}] {flag['code']} ({eye}, stage {flag['stage']}): {flag['message']}")
        lines.append(f"      decide: {flag['decide']}")
    return lines


def _render_decision(decision: dict[str, Any]) -> list[str]:
    """A person's decision, as the audit chain holds it."""
    applies = decision.get("applies_to") or {}
    lines = [f"== Decision: {decision['action']} by {decision['by']}, {decision['decided_at']} (audit seq "
             f"{decision['seq']}, recorded {decision['recorded_at']}) ==",
             f"Why:      {decision['note']}",
             f"On:       {applies.get('path')}, sha256 {applies.get('sha256')}"]
    if decision.get("flags_acknowledged"):
        lines.append("Flags acknowledged: " + ", ".join(decision["flags_acknowledged"]))
    if decision.get("result"):
        now = f"; {decision['result_now']}" if decision.get("result_now") else ""
        lines.append(f"Result:   {decision['result']}, status {decision.get('status')}, sha256 "
                     f"{decision['result_sha256']}{now}")
    for reason in decision.get("reasons") or []:
        lines.append(f"  {reason.get('field')}: {reason.get('message')}")
    superseded = decision.get("supersedes")
    if superseded:
        kept = f", kept as {superseded['archived']}" if superseded.get("archived") else ""
        lines.append(f"Replaces: {superseded['path']}, sha256 {superseded['sha256']}{kept}; the next processing is "
                     f"revision {decision.get('revision')}")
    elif decision["action"] == "replace" and decision.get("outcome") == "rejected":
        lines.append("The new version was refused by the chain (see the next processing); the published result stays")
    return lines


def _render_outcome(outcome: dict[str, Any]) -> list[str]:
    if outcome["event"] == "published":
        now = f"; {outcome['result_now']}" if outcome.get("result_now") else ""
        revision = f", revision {outcome['revision']} (supersedes sha256 {outcome.get('supersedes')})" \
            if outcome.get("revision") else ""
        lines = [f"Outcome:  published, status {outcome['status']}{revision}, recorded {outcome['recorded_at']}",
                 f"Result:   {outcome['result']}, sha256 {outcome['result_sha256']}{now}"]
        return lines + ([f"Input:    now {outcome['input']}"] if outcome.get("input") else [])
    if outcome["event"] is not None:
        meaning = OUTCOME_MEANINGS.get(outcome["event"], outcome["event"])
        lines = [f"Outcome:  {meaning}, recorded {outcome['recorded_at']}" + (":" if outcome.get("reasons") else "")]
        lines += [f"  {reason.get('field')}: {reason.get('message')}" for reason in outcome.get("reasons", [])]
        if outcome.get("input"):
            lines.append(f"Input:    now {outcome['input']}")
        return lines
    return [f"Outcome:  {UNFINISHED}"]


def render_configurations(configs: list[dict[str, Any]]) -> str:
    """The configurations in force (:func:`lenslane.report.story.configurations`), each as the log holds it."""
    lines = []
    for entry in configs:
        lines.append(f"Configuration in force (sha256 {entry['config_sha256']}):")
        if entry["config"] is None:
            lines.append("  (not in the log: an order recorded before the configuration was written into the chain)")
        else:
            lines += ["  " + line for line in json.dumps(entry["config"], indent=2, ensure_ascii=False).splitlines()]
    return "\n".join(lines)
