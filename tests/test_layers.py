"""The declared import direction between layers, checked on the source (and in a fresh interpreter)."""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

SERVICE = Path(__file__).resolve().parents[1] / "service"

# layer -> top-level names it may not import
FORBIDDEN = {
    "numerics": {"fastapi", "starlette", "sqlalchemy", "pydantic", "alembic", "psycopg", "service.api", "service.store", "service.allocation"},
    "allocation": {"fastapi", "starlette", "sqlalchemy", "alembic", "psycopg", "service.api", "service.store"},
    "store": {"fastapi", "starlette", "prometheus_client", "service.api", "service.allocation", "service.numerics"},
}


def imported_modules(path: Path) -> set[str]:
    tree = ast.parse(path.read_text())
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
    return names


@pytest.mark.parametrize("layer", sorted(FORBIDDEN))
def test_layer_imports(layer: str) -> None:
    offences = []
    for path in sorted((SERVICE / layer).rglob("*.py")):
        for name in imported_modules(path):
            for banned in FORBIDDEN[layer]:
                if name == banned or name.startswith(banned + "."):
                    offences.append(f"{path.relative_to(SERVICE)} imports {name}")
    assert not offences, offences


def test_numerics_loads_no_web_or_database_module() -> None:
    code = (
        "import sys, service.numerics as n; "
        "bad = [m for m in ('fastapi', 'starlette', 'sqlalchemy', 'pydantic') if m in sys.modules]; "
        "print(','.join(bad))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""


def test_no_grab_bag_modules() -> None:
    names = {p.stem for p in SERVICE.rglob("*.py")}
    assert not names & {"utils", "helpers", "misc", "common"}
