"""Fuzzing the intake and the chain: mutated orders end as a clean rejection or a valid result, never a crash.

Each example takes one of the sample orders (valid and refused ones) and
mutates it a few times: a value replaced by any JSON value, a key removed or
added, a number scaled to the edge of its range or past it. The engine's own
path reads it (``Lab.examine``: parse, contract) and runs the chain. Whatever
the bytes, the outcome is one of: refused with problems that each name a field
and say why; a stage failing with its name (the order is rejected, the engine
goes on); or a result that the result model accepts and that is written as JSON.
"""
from __future__ import annotations

import copy
import json
from pathlib import Path
from typing import Any

from hypothesis import HealthCheck, event, given, settings, strategies as st

from lenslane.chain.pipeline import Pipeline, StageFailure
from lenslane.contract.models import LensOrderResult
from lenslane.lab.examine import examine
from lenslane.lab.outcomes import result_bytes
from tests.conftest import SAMPLES

#: The valid samples first (hypothesis draws from the front more often), then the refused ones.
ORDERS = [json.loads(path.read_bytes())
          for path in sorted(Path(SAMPLES).glob("*.json"), key=lambda p: (p.name.startswith("rejected"), p.name))]
#: Mostly numbers scaled (the structure stays, so many reach the chain), sometimes the structure itself.
ACTIONS = ["scale"] * 6 + ["replace", "replace", "remove", "add"]

JSON_VALUES = st.recursive(
    st.none() | st.booleans() | st.integers(-10**6, 10**6) | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(max_size=12),
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=8), inner, max_size=3),
    max_leaves=6)
SCALES = [1.5, 0.5, 2.0, 1.25, -1.0, 0.0, 3.0, 10.0, 0.01, 1e6]


def _places(node: Any, found: list[tuple[Any, Any]]) -> list[tuple[Any, Any]]:
    """Every (container, key) in a JSON tree."""
    items = node.items() if isinstance(node, dict) else enumerate(node) if isinstance(node, list) else ()
    for key, value in items:
        found.append((node, key))
        _places(value, found)
    return found


@st.composite
def mutated_orders(draw) -> dict[str, Any]:
    order = copy.deepcopy(draw(st.sampled_from(ORDERS)))
    for _ in range(draw(st.integers(1, 3))):
        action = draw(st.sampled_from(ACTIONS))
        places = _places(order, [])
        numbers = [(c, k) for c, k in places  # the optics' numbers (a birth year scaled is only refused)
                   if isinstance(c[k], (int, float)) and not isinstance(c[k], bool) and k != "birth_year"]
        container, key = draw(st.sampled_from(numbers if action == "scale" and numbers else places))
        value = container[key] if (isinstance(container, dict) and key in container) or isinstance(container, list) \
            else None
        if action == "scale" and isinstance(value, (int, float)) and not isinstance(value, bool):
            scaled = value * draw(st.sampled_from(SCALES)) if value else draw(st.sampled_from(SCALES))
            container[key] = round(scaled) if isinstance(value, int) else scaled
        elif action == "remove" and isinstance(container, dict):
            container.pop(key, None)
        elif action == "add" and isinstance(container, dict):
            container[draw(st.text(min_size=1, max_size=10))] = draw(JSON_VALUES)
        else:
            container[key] = draw(JSON_VALUES)
    return order


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(order=mutated_orders())
def test_mutated_orders_are_refused_cleanly_or_give_a_valid_result(default_host, order):
    raw = json.dumps(order).encode()
    examined = examine(raw, default_host.settings.materials)
    if examined.problems is not None:
        event("refused by the contract")
        assert examined.problems and not examined.maybe_incomplete  # whole JSON is never "still being written"
        for problem in examined.problems:
            assert set(problem) == {"field", "message"} and problem["field"] and problem["message"]
        return
    try:
        result = Pipeline(default_host).run(examined.order, examined.parsed).result
    except StageFailure as failure:  # rejected naming the stage; the engine goes on
        event("a stage failed")
        assert failure.stage in [link.stage.name for link in default_host.chain] and failure.message
        return
    event(f"result {result['status']}")
    LensOrderResult.model_validate(result)
    assert result["order_id"] == order["order_id"]
    assert json.loads(result_bytes(result))["order_id"] == order["order_id"]
