"""Production settings refuse placeholder and short secrets, including the deploy example's."""

from __future__ import annotations

import re
import secrets
from pathlib import Path

import pytest
from pydantic import ValidationError

from service.api import create_app
from service.settings import Settings

DEPLOY_SECRET = Path(__file__).resolve().parents[1] / "deploy" / "kubernetes" / "secret.example.yaml"
GOOD_DATABASE = "postgresql+psycopg://mixline@db.internal:5432/mixline"


def production(**changes: object) -> Settings:
    values: dict[str, object] = {
        "environment": "production",
        "database_url": GOOD_DATABASE,
        "bootstrap_operator_key": secrets.token_urlsafe(32),
        "signing_key_file": "/run/secrets/mixline-signing.pem",
    }
    values.update(changes)
    return Settings(**values)  # type: ignore[arg-type]


def test_a_random_secret_passes() -> None:
    assert production().environment == "production"
    assert production(database_url="postgresql+psycopg://mixline:" + secrets.token_urlsafe(24) + "@db:5432/m")


@pytest.mark.parametrize("secret", [
    "changeme", "secret",
    "replace-with-at-least-32-random-characters",  # long, and a placeholder all the same
    "CHANGE_ME_CHANGE_ME_CHANGE_ME_CHANGE_ME",
    "example-operator-key-0123456789abcdefghijkl",
    "short-but-random-9f3k",  # 21 characters
    "a" * 40, "12121212121212121212121212121212",  # long, too few distinct characters
])
def test_placeholder_or_weak_operator_keys_are_refused(secret: str) -> None:
    with pytest.raises(ValidationError, match="MIXLINE_BOOTSTRAP_OPERATOR_KEY"):
        production(bootstrap_operator_key=secret)
    assert Settings(bootstrap_operator_key=secret).environment == "development"  # fine for development


def test_the_deploy_example_secret_fails_the_production_check() -> None:
    text = DEPLOY_SECRET.read_text()
    # stringData entries, quoted or not: `  MIXLINE_X: "value"`, `  MIXLINE_X: 'value'`, `  MIXLINE_X: value`.
    found = re.findall(r"""^\s+(MIXLINE_[A-Z_]+):\s*(?:"([^"]*)"|'([^']*)'|(\S+))\s*$""", text, flags=re.MULTILINE)
    values = {name: a or b or c for name, a, b, c in found}
    assert "MIXLINE_BOOTSTRAP_OPERATOR_KEY" in values, "the example secret no longer names the operator key"
    with pytest.raises(ValidationError, match="MIXLINE_BOOTSTRAP_OPERATOR_KEY"):
        production(bootstrap_operator_key=values["MIXLINE_BOOTSTRAP_OPERATOR_KEY"])
    if "MIXLINE_DATABASE_URL" in values and ":" in values["MIXLINE_DATABASE_URL"].split("@")[0].split("//")[-1]:
        with pytest.raises(ValidationError, match="password in MIXLINE_DATABASE_URL"):
            production(database_url=values["MIXLINE_DATABASE_URL"])


def test_production_serves_only_with_a_signing_key_file(tmp_path: Path) -> None:
    settings = production(signing_key_file=None, database_url=f"sqlite:///{tmp_path / 'p.db'}")
    assert settings.environment == "production"  # migrations and audit checks need no signing key
    with pytest.raises(ValueError, match="MIXLINE_SIGNING_KEY_FILE"):
        create_app(settings)
