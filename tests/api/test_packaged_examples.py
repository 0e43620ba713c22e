"""The OpenAPI examples are package data: a wheel installed away from the source tree (as in the
image) embeds every one of them in its OpenAPI document."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
EXAMPLES = ROOT / "service" / "api" / "openapi_examples"

PROBE = """
import json, service, service.api.app as app_module
from service.api import create_app
from service.settings import Settings
app = create_app(Settings(database_url="sqlite:///" + {db!r}))
doc = app.openapi()
embedded = sorted(op["operationId"] for item in doc["paths"].values() for op in item.values()
                  if any("examples" in m for r in op["responses"].values() for m in r.get("content", {{}}).values()))
print(json.dumps({{"file": service.__file__, "embedded": embedded}}))
"""


@pytest.mark.slow
def test_an_installed_wheel_serves_the_examples(tmp_path: Path) -> None:
    source = tmp_path / "source"
    source.mkdir()
    for name in ("pyproject.toml", "README.md", "LICENSE"):
        shutil.copy(ROOT / name, source / name)
    shutil.copytree(ROOT / "service", source / "service", ignore=shutil.ignore_patterns("__pycache__"))
    wheels = tmp_path / "wheels"
    subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "-q", "--no-deps", "--no-build-isolation", "-w", str(wheels), str(source)],
        check=True, capture_output=True, timeout=300,
    )
    (wheel,) = wheels.glob("mixline-*.whl")
    packaged = {Path(n).name for n in zipfile.ZipFile(wheel).namelist() if "/openapi_examples/" in n}
    assert packaged == {p.name for p in EXAMPLES.glob("*.json")}
    target = tmp_path / "site"
    subprocess.run(
        [sys.executable, "-m", "pip", "install", "-q", "--no-deps", "--target", str(target), str(wheel)],
        check=True, capture_output=True, timeout=300,
    )
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    env = {**os.environ, "PYTHONPATH": str(target)}
    out = subprocess.run(
        [sys.executable, "-c", PROBE.format(db=str(tmp_path / "probe.db"))],
        cwd=elsewhere, env=env, check=True, capture_output=True, text=True, timeout=120,
    )
    found = json.loads(out.stdout.strip().splitlines()[-1])
    assert found["file"].startswith(str(target))  # the installed copy, not the source tree
    expected = sorted({json.loads(p.read_text())["operation_id"] for p in EXAMPLES.glob("*.json")})
    assert found["embedded"] == expected
