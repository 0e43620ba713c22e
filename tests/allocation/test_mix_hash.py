"""The canonical form and content hash of a mix: factor models hash by content, and the forms
that existed before them hash as they did.

Reference values: SHA-256 from hashlib of the sorted-key orjson text, computed in the test.
"""

from __future__ import annotations

import copy
import hashlib
from typing import Any

import orjson

from service.allocation import canonical_inputs, canonical_text, content_hash

ASSETS = [{"code": "EQ", "expected_return": 0.07, "volatility": None},
          {"code": "BD", "expected_return": 0.03, "volatility": None}]
MODEL = {"loadings": [[1.0, 0.2], [0.1, 0.9]], "factor_covariance": [[0.03, 0.001], [0.001, 0.01]],
         "specific_volatility": [0.05, 0.02]}


def canonical(**risk: Any) -> dict[str, Any]:
    return canonical_inputs(assets=ASSETS, risk_free_rate=0.02, correlation=None, bounds=None, long_only=True,
                            covariance=risk.get("covariance"), factor_model=risk.get("factor_model"))


def test_a_covariance_mix_has_no_factor_model_key() -> None:
    form = canonical(covariance=[[0.04, 0.01], [0.01, 0.02]])
    assert "factor_model" not in form
    # The hash is SHA-256 of the sorted-key text, the same text that is stored.
    assert content_hash(form) == hashlib.sha256(orjson.dumps(form, option=orjson.OPT_SORT_KEYS)).hexdigest()
    assert content_hash(canonical_text(form)) == content_hash(form)


def test_factor_models_hash_by_content() -> None:
    first = canonical(factor_model=MODEL)
    assert first["factor_model"] == MODEL
    reordered = canonical(factor_model=dict(reversed(list(copy.deepcopy(MODEL).items()))))
    assert content_hash(reordered) == content_hash(first)
    other = copy.deepcopy(MODEL)
    other["loadings"][1][0] = 0.11
    assert content_hash(canonical(factor_model=other)) != content_hash(first)
    assert content_hash(canonical(covariance=[[0.04, 0.01], [0.01, 0.02]])) != content_hash(first)
