"""Service settings: one `Settings` read from `MIXLINE_*` environment variables at start-up."""

from __future__ import annotations

from typing import Literal

from pydantic import Field, model_validator
from pydantic_settings import BaseSettings, SettingsConfigDict
from sqlalchemy.engine import make_url

# Secrets that must never guard a production deployment, whole or as a part: an example value
# copied from a manifest ("replace-with-...", "CHANGE_ME") reads as long and random enough.
PLACEHOLDER_SECRETS = frozenset({"", "changeme", "change-me", "secret", "operator", "demo", "test"})
PLACEHOLDER_WORDS = ("replace", "change", "example", "placeholder", "secret", "password", "dummy", "sample")
MIN_PRODUCTION_SECRET_LENGTH = 32
# A random secret of 32 characters has far more; "aaaa...a" or "1234...12" has fewer.
MIN_DISTINCT_CHARACTERS = 8


def secret_weakness(secret: str, *, min_length: int = MIN_PRODUCTION_SECRET_LENGTH) -> str | None:
    """Why ``secret`` may not guard production, or None if it may."""
    lowered = secret.lower()
    if lowered in PLACEHOLDER_SECRETS:
        return "is a placeholder"
    found = next((w for w in PLACEHOLDER_WORDS if w in lowered.replace("_", "").replace("-", "")), None)
    if found is not None:
        return f"looks like a placeholder (contains {found!r})"
    if len(secret) < min_length:
        return f"is shorter than {min_length} characters"
    if len(set(secret)) < MIN_DISTINCT_CHARACTERS:
        return f"has fewer than {MIN_DISTINCT_CHARACTERS} distinct characters"
    return None


class Settings(BaseSettings):
    model_config = SettingsConfigDict(env_prefix="MIXLINE_", extra="ignore")

    environment: Literal["development", "production"] = "development"
    database_url: str = "sqlite:///./mixline.db"
    bootstrap_operator_key: str | None = None
    # Largest batch a record-keeper may send in one call (a plan's whole membership).
    batch_limit: int = Field(default=300_000, ge=1)
    # Largest request body accepted, in bytes: a 300,000-member batch is about 40 MB.
    max_body_bytes: int = Field(default=128 * 1024 * 1024, ge=1024)
    # How long a stored Idempotency-Key answer is replayed, in hours.
    idempotency_retention_hours: int = Field(default=24, ge=1)
    # How long a reservation of an Idempotency-Key holds without an answer: a process that
    # crashed mid-request holds the key no longer than this. Longer than the slowest request
    # (a 300,000-member batch takes seconds); an answer that comes after its lease ran out and
    # another request took the key is refused, never logged twice.
    idempotency_lease_seconds: int = Field(default=60, ge=1)
    # Largest condition number a published covariance may have.
    max_condition_number: float = Field(default=1e12, gt=1)
    # Largest number of assets in one risky mix.
    max_assets: int = Field(default=2000, ge=1)
    # Largest number of frontier points one request may ask for.
    max_frontier_points: int = Field(default=500, ge=2)
    # Requests per second per API key (token bucket, per process), and the bucket's size. The
    # default guards against a runaway client, not a quota: one portal key may carry a plan's
    # whole enrolment traffic (thousands a second); set it to the peak a key should reach.
    rate_limit_per_second: float = Field(default=5000.0, gt=0)
    rate_limit_burst: int = Field(default=10000, ge=1)
    # Failed authentications per second per client address (per process), and the bucket's size.
    auth_failure_limit_per_second: float = Field(default=5.0, gt=0)
    auth_failure_burst: int = Field(default=20, ge=1)
    # How long a process trusts what it read about a key (revocation, expiry), in seconds.
    key_cache_seconds: float = Field(default=2.0, ge=0, le=5)
    # Ed25519 private key (PEM, PKCS#8) that signs audit heads; unset: an ephemeral key
    # (development only).
    signing_key_file: str | None = None
    # The JSON access log: "stdout", "stderr", "off", or a file path (appended to).
    access_log: str = "stdout"
    # Database connections one process may hold: db_pool_size kept open, up to db_max_overflow
    # more under load (the log writer's own connection included). Replicas x (size + overflow)
    # must stay below the server's max_connections; deploy/kubernetes/deployment.yaml shows the sum.
    db_pool_size: int = Field(default=10, ge=1)
    db_max_overflow: int = Field(default=20, ge=0)
    # Largest mix the numerical cross-checks run for when the publish request does not say
    # (they take ~5 s at 200 assets and ~50 s at 400); asked for explicitly above it: 422.
    max_cross_check_assets: int = Field(default=250, ge=0)
    # How long a replica may answer allocations from the active version it last read, in
    # seconds: an activation on any replica is in force everywhere within this (bounded so that
    # replicas always agree within 5 s).
    active_version_ttl_seconds: float = Field(default=1.0, ge=0.0, le=2.0)

    @model_validator(mode="after")
    def _refuse_placeholder_secrets(self) -> Settings:
        if self.environment != "production":
            return self
        key = self.bootstrap_operator_key
        if key is not None:
            weakness = secret_weakness(key)
            if weakness is not None:
                raise ValueError(f"MIXLINE_BOOTSTRAP_OPERATOR_KEY {weakness}; refusing to start in production")
        try:
            password = make_url(self.database_url).password
        except Exception:
            password = None
        if password is not None:
            weakness = secret_weakness(str(password), min_length=1)
            if weakness is not None:
                raise ValueError(f"the password in MIXLINE_DATABASE_URL {weakness}; refusing to start in production")
        return self
