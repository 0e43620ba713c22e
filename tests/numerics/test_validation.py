"""build_inputs refuses every unsolvable input with the request field and a reason that
carries the numbers; the solvers refuse a risk-free rate that leaves no tangency."""

from __future__ import annotations

import math
import re
from typing import Any

import numpy as np
import pytest

from service.numerics import InputError, MixInputs, build_inputs, solve_mix, tangency

CODES = ["EQ_HOME", "EQ_WORLD", "BOND_GOV", "BOND_CORP"]
MU = [0.07, 0.08, 0.03, 0.04]
VOLS = [0.16, 0.18, 0.05, 0.07]
CORR = [[1.0, 0.7, 0.1, 0.3],
        [0.7, 1.0, 0.0, 0.2],
        [0.1, 0.0, 1.0, 0.6],
        [0.3, 0.2, 0.6, 1.0]]


def cov() -> list[list[float]]:
    v = np.array(VOLS)
    out: list[list[float]] = (np.array(CORR) * np.outer(v, v)).tolist()
    return out


def refused(**overrides: Any) -> InputError:
    args: dict[str, Any] = {"codes": CODES, "expected_returns": MU, "risk_free_rate": 0.02,
                            "volatilities": VOLS, "correlation": CORR}
    args.update(overrides)
    with pytest.raises(InputError) as info:
        build_inputs(args.pop("codes"), args.pop("expected_returns"), args.pop("risk_free_rate"), **args)
    return info.value


def test_valid_inputs_are_frozen() -> None:
    inputs = build_inputs(CODES, MU, 0.02, volatilities=VOLS, correlation=CORR, bounds={"EQ_WORLD": (0.1, 0.5)})
    assert isinstance(inputs, MixInputs) and inputs.n == 4 and not inputs.unconstrained
    for arr in (inputs.expected_returns, inputs.covariance, inputs.lower, inputs.upper):
        assert not arr.flags.writeable
    np.testing.assert_allclose(inputs.volatilities, VOLS, rtol=1e-15)  # sqrt(diag) of vols x corr x vols
    assert inputs.lower[1] == 0.1 and inputs.upper[1] == 0.5 and inputs.upper[0] == 1.0
    free = build_inputs(CODES, MU, 0.02, covariance=cov(), long_only=False)
    assert free.unconstrained and np.all(np.isneginf(free.lower)) and np.all(np.isposinf(free.upper))


def test_error_string_is_field_and_reason() -> None:
    err = InputError("risk_free_rate", "must be finite, got nan")
    assert str(err) == "risk_free_rate: must be finite, got nan"
    assert err.field == "risk_free_rate" and err.reason == "must be finite, got nan"
    assert isinstance(err, ValueError)


def test_no_assets() -> None:
    err = refused(codes=[], expected_returns=[], volatilities=[], correlation=[])
    assert err.field == "assets" and "at least one asset" in err.reason


def test_empty_code() -> None:
    err = refused(codes=["EQ_HOME", " ", "BOND_GOV", "BOND_CORP"])
    assert err.field == "assets[1].code" and "non-empty" in err.reason


def test_duplicate_code() -> None:
    err = refused(codes=["EQ_HOME", "X", "BOND_GOV", "X"])
    assert err.field == "assets[3].code"
    assert err.reason == "duplicate code 'X', also at assets[1]"


def test_non_finite_expected_return() -> None:
    err = refused(expected_returns=[0.07, 0.08, math.nan, 0.04])
    assert err.field == "assets[2].expected_return" and "finite" in err.reason


def test_expected_return_count() -> None:
    err = refused(expected_returns=[0.07, 0.08, 0.03])
    assert err.field == "expected_return" and "(3,)" in err.reason and "4" in err.reason


def test_non_finite_risk_free_rate() -> None:
    err = refused(risk_free_rate=math.inf)
    assert err.field == "risk_free_rate" and "finite" in err.reason


def test_both_or_neither_matrix() -> None:
    assert refused(covariance=cov()).field == "covariance"
    err = refused(correlation=None)
    assert err.field == "covariance" and "exactly one" in err.reason


def test_correlation_needs_volatilities() -> None:
    err = refused(volatilities=None)
    assert err.field == "correlation" and "volatility" in err.reason


def test_volatility_not_positive() -> None:
    err = refused(volatilities=[0.16, 0.0, 0.05, 0.07])
    assert err.field == "assets[1].volatility" and "> 0" in err.reason and "0" in err.reason


def test_volatility_count() -> None:
    err = refused(volatilities=[0.16, 0.18])
    assert err.field == "volatility" and "(2,)" in err.reason


def test_covariance_and_volatilities_disagree() -> None:
    err = refused(correlation=None, covariance=cov(), volatilities=[0.16, 0.18, 0.051, 0.07])
    assert err.field == "assets[2].volatility"
    assert "0.051" in err.reason and "0.05" in err.reason
    # within 1e-9 relative they agree
    build_inputs(CODES, MU, 0.02, covariance=cov(), volatilities=[v * (1 + 1e-12) for v in VOLS])


def test_correlation_asymmetric() -> None:
    bad = [row[:] for row in CORR]
    bad[2][1] = 0.05
    err = refused(correlation=bad)
    assert err.field == "correlation[2][1]"
    assert "0.05" in err.reason and "not symmetric" in err.reason


def test_correlation_diagonal() -> None:
    bad = [row[:] for row in CORR]
    bad[3][3] = 0.99
    err = refused(correlation=bad)
    assert err.field == "correlation[3][3]" and "0.99" in err.reason


def test_correlation_outside_unit_interval() -> None:
    bad = [row[:] for row in CORR]
    bad[0][1] = bad[1][0] = 1.2
    err = refused(correlation=bad)
    assert err.field == "correlation[0][1]" and "1.2" in err.reason


def test_correlation_one_ulp_outside_is_rounding() -> None:
    # 1 + 2**-52 is the next float above 1 (IEEE 754 double); a matrix computed in floating point
    # (e.g. a covariance scaled by its volatilities) puts it on the diagonal.
    one_up = float(np.nextafter(1.0, 2.0))
    assert one_up == 1.0000000000000002
    near = [row[:] for row in CORR]
    for i in range(len(near)):
        near[i][i] = one_up
    inputs = build_inputs(CODES, MU, 0.02, volatilities=VOLS, correlation=near)
    exact = build_inputs(CODES, MU, 0.02, volatilities=VOLS, correlation=CORR)
    np.testing.assert_array_equal(inputs.covariance, exact.covariance)  # the unit diagonal is restored
    # Beyond the 1e-12 tolerance it is a claim, and refused with the value as sent.
    beyond = [row[:] for row in CORR]
    beyond[0][1] = beyond[1][0] = 1.0 + 1e-9
    err = refused(correlation=beyond)
    assert err.field == "correlation[0][1]" and "1.000000001" in err.reason
    off = [row[:] for row in CORR]
    off[2][2] = 1.0 + 1e-9
    assert refused(correlation=off).field == "correlation[2][2]"


def test_correlation_not_psd() -> None:
    bad = [[1.0, 0.9, -0.9], [0.9, 1.0, 0.9], [-0.9, 0.9, 1.0]]
    err = refused(codes=CODES[:3], expected_returns=MU[:3], volatilities=VOLS[:3], correlation=bad)
    smallest = np.linalg.eigvalsh(np.array(bad))[0]  # reference: numpy's eigenvalues
    assert err.field == "correlation"
    assert err.reason == f"correlation is not positive semi-definite: smallest eigenvalue {smallest:.3g}"


def test_covariance_not_psd() -> None:
    bad = np.array(cov())
    bad[0, 1] = bad[1, 0] = 0.035  # above sqrt(0.0256 * 0.0324) = 0.0288: not PSD
    err = refused(correlation=None, volatilities=None, covariance=bad.tolist())
    smallest = np.linalg.eigvalsh(bad)[0]
    assert err.field == "covariance"
    assert err.reason == f"covariance is not positive semi-definite: smallest eigenvalue {smallest:.3g}"
    assert re.search(r"-\d", err.reason)


def test_covariance_asymmetric_and_diagonal_and_shape() -> None:
    bad = np.array(cov())
    bad[3, 0] += 1e-6
    assert refused(correlation=None, volatilities=None, covariance=bad.tolist()).field == "covariance[3][0]"
    bad = np.array(cov())
    bad[2, 2] = -0.01
    err = refused(correlation=None, volatilities=None, covariance=bad.tolist())
    assert err.field == "covariance[2][2]" and "-0.01" in err.reason
    err = refused(correlation=None, volatilities=None, covariance=np.eye(3).tolist())
    assert err.field == "covariance" and "(3, 3)" in err.reason
    ragged = [[1.0, 0.0], [0.0]]
    assert refused(correlation=ragged).field == "correlation"


def test_non_finite_matrix_entry() -> None:
    bad = np.array(cov())
    bad[1, 2] = math.nan
    err = refused(correlation=None, volatilities=None, covariance=bad.tolist())
    assert err.field == "covariance[1][2]" and "finite" in err.reason


def test_singular_covariance_fails_the_condition_bound() -> None:
    v = np.array([0.1, 0.2, 0.3])
    singular = np.outer(v, v) + np.diag([0.0, 0.0, 0.0])  # rank one: PSD but singular
    err = refused(codes=CODES[:3], expected_returns=MU[:3], volatilities=None, correlation=None,
                  covariance=singular.tolist())
    assert err.field == "covariance"
    assert "condition number" in err.reason and "exceeds the bound 1e+12" in err.reason


def test_ill_conditioned_correlation_against_a_custom_bound() -> None:
    corr = [[1.0, 0.999], [0.999, 1.0]]
    eig = np.linalg.eigvalsh(np.array(corr))  # reference: numpy, 0.001 and 1.999
    err = refused(codes=CODES[:2], expected_returns=MU[:2], volatilities=VOLS[:2], correlation=corr,
                  max_condition_number=1000.0)
    assert err.field == "correlation"
    assert f"condition number {eig[-1] / eig[0]:.3g} exceeds the bound 1e+03" in err.reason
    build_inputs(CODES[:2], MU[:2], 0.02, volatilities=VOLS[:2], correlation=corr, max_condition_number=1e4)


def test_bounds_unknown_code() -> None:
    err = refused(bounds={"NOPE": (0.0, 0.5)})
    assert err.field == "bounds.NOPE" and err.reason == "unknown asset code"


def test_bounds_reversed() -> None:
    err = refused(bounds={"BOND_GOV": (0.6, 0.2)})
    assert err.field == "bounds.BOND_GOV" and "0.6" in err.reason and "0.2" in err.reason


def test_bounds_negative_when_long_only() -> None:
    err = refused(bounds={"EQ_WORLD": (-0.1, 0.5)})
    assert err.field == "bounds.EQ_WORLD" and "-0.1" in err.reason and "long_only" in err.reason
    build_inputs(CODES, MU, 0.02, volatilities=VOLS, correlation=CORR, long_only=False,
                 bounds={"EQ_WORLD": (-0.1, 0.5)})


def test_bounds_not_numbers() -> None:
    err = refused(bounds={"EQ_WORLD": (math.nan, 0.5)})
    assert err.field == "bounds.EQ_WORLD"


def test_full_investment_infeasible() -> None:
    err = refused(bounds={c: (0.0, 0.2) for c in CODES})
    assert err.field == "bounds" and "0.8" in err.reason and "sum" in err.reason
    err = refused(bounds={"EQ_HOME": (0.6, 1.0), "EQ_WORLD": (0.5, 1.0)})
    assert err.field == "bounds" and "1.1" in err.reason


def test_no_portfolio_beats_the_risk_free_rate() -> None:
    inputs = build_inputs(CODES, MU, 0.09, volatilities=VOLS, correlation=CORR)
    with pytest.raises(InputError) as info:
        tangency(inputs)
    assert info.value.field == "risk_free_rate"
    # best feasible expected return: all in the highest-return asset, 0.08 (greedy LP)
    assert info.value.reason == ("no feasible portfolio earns more than the risk-free rate 0.09: "
                                 "best expected return 0.08")
    capped = build_inputs(CODES, MU, 0.07, volatilities=VOLS, correlation=CORR,
                          bounds={"EQ_WORLD": (0.0, 0.5), "EQ_HOME": (0.0, 0.3)})
    with pytest.raises(InputError, match=r"best expected return 0\.069$"):  # 0.5*0.08 + 0.3*0.07 + 0.2*0.04
        solve_mix(capped)


def test_inefficient_branch() -> None:
    inputs = build_inputs(CODES, MU, 0.06, volatilities=VOLS, correlation=CORR, long_only=False)
    ones = np.ones(4)
    excess = np.array(MU) - 0.06
    denominator = ones @ np.linalg.solve(inputs.covariance, excess)  # reference: numpy
    assert denominator < 0
    with pytest.raises(InputError) as info:
        tangency(inputs)
    assert info.value.field == "risk_free_rate"
    assert f"1' S^-1 (mu - rf) = {denominator:.3g} <= 0" in info.value.reason
    assert "inefficient branch" in info.value.reason
