"""SolvedMix.to_document / from_document: JSON-able, exact round trip, no solving."""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pytest

import service.numerics as numerics
from service.numerics import SolvedMix, build_inputs, solve_mix
from tests.numerics.scenarios import scenario


def _only_plain_json(value: Any) -> bool:
    if isinstance(value, dict):
        return all(isinstance(k, str) and _only_plain_json(v) for k, v in value.items())
    if isinstance(value, list):
        return all(_only_plain_json(v) for v in value)
    if isinstance(value, float):
        return math.isfinite(value)
    # Integers: the frontier's change counts and asset indices (never booleans).
    return isinstance(value, str) or (isinstance(value, int) and not isinstance(value, bool))


@pytest.mark.parametrize("case", ["long_only", "capped", "unbounded"])
def test_round_trip_is_exact(case: str) -> None:
    solved = solve_mix(scenario(7, 3, case=case), cross_check=True)
    doc = solved.to_document()
    assert _only_plain_json(doc)
    text = json.dumps(doc, allow_nan=False)
    again = SolvedMix.from_document(json.loads(text))
    assert again.to_document() == doc
    assert json.dumps(again.to_document(), allow_nan=False) == text
    for name in ("expected_returns", "covariance", "lower", "upper"):
        assert np.array_equal(getattr(again.inputs, name), getattr(solved.inputs, name))
        assert not getattr(again.inputs, name).flags.writeable
    assert np.array_equal(again.tangency.weights, solved.tangency.weights)
    assert again.tangency.sharpe_ratio == solved.tangency.sharpe_ratio
    assert again.tangency.method == solved.tangency.method
    assert np.array_equal(again.frontier.corner_weights, solved.frontier.corner_weights)
    assert again.frontier.unbounded_above == solved.frontier.unbounded_above
    assert again.cross_checks == solved.cross_checks
    assert again.kkt_residual == solved.kkt_residual
    assert again.inputs.codes == solved.inputs.codes
    assert again.inputs.unconstrained == solved.inputs.unconstrained


def test_infinite_bounds_are_strings() -> None:
    inputs = build_inputs(["A", "B", "C"], [0.05, 0.07, 0.09], 0.01, volatilities=[0.1, 0.15, 0.2],
                          correlation=np.eye(3).tolist(), long_only=False, bounds={"A": (0.0, 0.5)})
    doc = solve_mix(inputs, cross_check=False).to_document()
    assert doc["inputs"]["lower"] == [0.0, "-inf", "-inf"]
    assert doc["inputs"]["upper"] == [0.5, "inf", "inf"]
    back = SolvedMix.from_document(doc)
    assert np.isneginf(back.inputs.lower[1]) and np.isposinf(back.inputs.upper[2])


def test_from_document_solves_nothing(monkeypatch: pytest.MonkeyPatch) -> None:
    doc = solve_mix(scenario(6, 8, case="capped"), cross_check=True).to_document()

    def forbidden(*args: object, **kwargs: object) -> None:
        raise AssertionError("from_document must not solve or factorise anything")

    import scipy.linalg
    import scipy.optimize

    import service.numerics.active_set as active_set
    import service.numerics.closed_form as closed_form
    import service.numerics.frontier as frontier
    import service.numerics.solved_mix as solved_mix

    for module, name in [(numerics, "solve_mix"), (solved_mix, "tangency"), (solved_mix, "min_variance_with_solution"),
                         (solved_mix, "frontier_from_min_variance"), (solved_mix, "cross_checks"),
                         (active_set, "solve_box_problem"), (closed_form, "ClosedForm"),
                         (frontier, "_critical_line"), (scipy.optimize, "minimize"),
                         (scipy.linalg, "cho_factor"), (np.linalg, "eigvalsh"), (np.linalg, "solve"),
                         (np.linalg, "cholesky")]:
        monkeypatch.setattr(module, name, forbidden)
    again = SolvedMix.from_document(doc)
    assert again.to_document() == doc


def test_from_document_checks_format_and_shapes() -> None:
    doc = solve_mix(scenario(4, 1, case="long_only"), cross_check=False).to_document()
    with pytest.raises(ValueError, match="format"):
        SolvedMix.from_document({**doc, "format": "other/9"})
    broken = json.loads(json.dumps(doc))
    broken["tangency"]["weights"] = broken["tangency"]["weights"][:-1]
    with pytest.raises(ValueError, match=r"tangency.weights has shape \(3,\), expected \(4,\)"):
        SolvedMix.from_document(broken)
