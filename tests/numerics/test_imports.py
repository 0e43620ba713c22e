"""The numerics layer's public surface and its import direction (numpy/scipy/stdlib only)."""

from __future__ import annotations

import subprocess
import sys

import service.numerics as numerics

PUBLIC = {"InputError", "MixInputs", "build_inputs", "Portfolio", "CrossCheck", "Frontier", "SolvedMix",
          "solve_mix", "tangency", "min_variance", "efficient_frontier", "cross_checks",
          "HistoryEstimate", "estimate_from_history", "history_matrix", "NearestCorrelation", "nearest_correlation"}


def test_public_names_are_exactly_the_interface() -> None:
    assert set(numerics.__all__) == PUBLIC
    assert len(numerics.__all__) == len(PUBLIC)
    for name in PUBLIC:
        assert getattr(numerics, name) is not None
    assert callable(numerics.tangency) and callable(numerics.cross_checks)


def test_importing_numerics_loads_no_web_or_database_module() -> None:
    code = ("import sys, service.numerics; "
            "bad = sorted(m for m in sys.modules if m.split('.')[0] in "
            "{'fastapi', 'sqlalchemy', 'pydantic', 'starlette', 'alembic', 'psycopg', 'cvxpy'} "
            "or m.startswith(('service.api', 'service.store', 'service.allocation'))); print(bad)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]", out.stdout + out.stderr
