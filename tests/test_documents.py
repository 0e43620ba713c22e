"""The repository's own documents: docs/API.md covers every operation served, and no document
sends readers outside the repository."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from service.settings import Settings

ROOT = Path(__file__).resolve().parents[1]
DOCUMENTS = [ROOT / "README.md", ROOT / "DEVELOPERS.md", ROOT / "docs" / "API.md"]


def test_the_api_document_names_every_operation_served() -> None:
    from service.api import create_app

    text = (ROOT / "docs" / "API.md").read_text()
    doc = create_app().openapi()
    missing = []
    for path, item in doc["paths"].items():
        for method in item:
            # Written as "`GET /v1/plans/{plan_id}`" or, for a query, "`GET /v1/...?member_id=...`".
            if not re.search(rf"`{method.upper()} {re.escape(path)}[`?]", text):
                missing.append(f"{method.upper()} {path}")
    assert not missing, missing
    assert "/docs" in text and "/openapi.json" in text


@pytest.mark.parametrize("document", DOCUMENTS, ids=lambda p: p.name)
def test_links_stay_inside_the_repository(document: Path) -> None:
    text = document.read_text()
    assert "../shared" not in text
    # Link targets hold a "." or "/" (README's formulas have "E[r](y)", which is no link).
    for target in re.findall(r"\]\(([^)#\s]*[./][^)#\s]*)(?:#[^)]*)?\)", text):
        assert not re.match(r"[a-z]+://", target), f"{document.name} links outside: {target}"
        resolved = (document.parent / target).resolve()
        assert resolved.is_relative_to(ROOT), f"{document.name} links outside the repository: {target}"
        assert resolved.exists(), f"{document.name} links to a missing file: {target}"


def test_every_setting_is_documented() -> None:
    text = (ROOT / "DEVELOPERS.md").read_text()
    missing = [f"MIXLINE_{name.upper()}" for name in Settings.model_fields if f"`MIXLINE_{name.upper()}`" not in text]
    assert not missing, missing
