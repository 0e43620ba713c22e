"""One version: pyproject.toml's, as the installed package reports it, in OpenAPI, in the
build-info metric and in every image tag under deploy/."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

import yaml
from prometheus_client.parser import text_string_to_metric_families

from service.version import VERSION

ROOT = Path(__file__).resolve().parents[1]


def pyproject_version() -> str:
    return str(tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["version"])


def test_the_installed_package_reports_pyproject_version() -> None:
    # A mismatch means the environment holds an old install: `pip install -e .` again.
    assert VERSION == pyproject_version()


def test_openapi_and_build_info_carry_the_version() -> None:
    from service.api import create_app

    app = create_app()
    assert app.openapi()["info"]["version"] == VERSION
    families = {f.name: f for f in text_string_to_metric_families(app.state.metrics.render().decode())}
    (sample,) = families["mixline_build_info"].samples
    assert sample.labels["version"] == VERSION and sample.value == 1


def test_every_image_tag_in_deploy_is_the_version() -> None:
    tags = []
    for path in sorted((ROOT / "deploy" / "kubernetes").glob("*.yaml")):
        for doc in yaml.safe_load_all(path.read_text()):
            if doc and doc["kind"] in ("Deployment", "Job"):
                tags += [c["image"] for c in doc["spec"]["template"]["spec"]["containers"]]
    assert tags, "no images found"
    assert set(tags) == {f"mixline:{VERSION}"}
    build_line = re.search(r"-t (mixline:\S+)", (ROOT / "deploy" / "Containerfile").read_text())
    assert build_line is not None and build_line.group(1) == f"mixline:{VERSION}"
