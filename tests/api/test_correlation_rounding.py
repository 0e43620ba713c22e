"""A correlation matrix computed in floating point (1.0000000000000002 on its diagonal) publishes."""

from __future__ import annotations

import copy

import numpy as np
import pytest

from service.demo import DEMO_MIX

from .conftest import World

pytestmark = pytest.mark.anyio


async def test_a_diagonal_one_ulp_above_one_is_accepted(world: World, new_plan_id: str) -> None:
    keys = await world.plan(new_plan_id)
    exact = await world.publish(new_plan_id, keys, activate=False)
    # The correlation a client gets by scaling a covariance by its volatilities: in IEEE 754
    # doubles, cov[i][i] / (vol[i] * vol[i]) is often 1 + 2**-52 rather than 1.
    vols = np.array([a["volatility"] for a in DEMO_MIX["assets"]])
    cov = np.array(DEMO_MIX["correlation"]) * np.outer(vols, vols)
    rounded = (cov / np.outer(np.sqrt(np.diag(cov)), np.sqrt(np.diag(cov)))).tolist()
    for i in range(len(rounded)):
        rounded[i][i] = 1.0000000000000002  # the value reported, on every diagonal entry
    body = copy.deepcopy(DEMO_MIX) | {"version": "rounded", "correlation": rounded, "cross_check": False}
    r = await world.client.post(f"/v1/plans/{new_plan_id}/mixes", json=body, headers=keys["committee"])
    assert r.status_code == 201, r.text
    # Same assumptions up to rounding, so the same tangency as the exact matrix (to 1e-9).
    for code, w in exact["tangency"]["weights"].items():
        assert r.json()["tangency"]["weights"][code] == pytest.approx(w, abs=1e-9)
    beyond = copy.deepcopy(body) | {"version": "beyond"}
    beyond["correlation"][0][1] = beyond["correlation"][1][0] = 1.001
    refused = await world.client.post(f"/v1/plans/{new_plan_id}/mixes", json=beyond, headers=keys["committee"])
    assert refused.status_code == 422 and refused.json()["errors"][0]["field"] == "correlation[0][1]"
    assert "1.001" in refused.json()["errors"][0]["reason"]
