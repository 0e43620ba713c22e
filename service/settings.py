"""Service settings: one `Settings` read from `MIXLINE_*` environment variables at start-up."""

from __future__ import annotations

from typing import Literal

from pydantic import Field, model_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

# Secrets that must never guard a production deployment.
PLACEHOLDER_SECRETS = frozenset({"", "changeme", "change-me", "secret", "operator", "demo", "test"})
MIN_PRODUCTION_SECRET_LENGTH = 32


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
    # Largest condition number a published covariance may have.
    max_condition_number: float = Field(default=1e12, gt=1)
    # Largest number of assets in one risky mix.
    max_assets: int = Field(default=2000, ge=1)
    # Largest number of frontier points one request may ask for.
    max_frontier_points: int = Field(default=500, ge=2)
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
        if self.environment == "production":
            key = self.bootstrap_operator_key
            if key is not None and (
                key.lower() in PLACEHOLDER_SECRETS or len(key) < MIN_PRODUCTION_SECRET_LENGTH
            ):
                raise ValueError(
                    "MIXLINE_BOOTSTRAP_OPERATOR_KEY is a placeholder or shorter than "
                    f"{MIN_PRODUCTION_SECRET_LENGTH} characters; refusing to start in production"
                )
        return self
