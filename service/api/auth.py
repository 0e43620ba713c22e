"""API keys: issuing secrets, recognising a bearer, and the role/plan rules of the contract.

A secret reads `mxl_<key_id>_<random>`: the key id finds the stored hash, the random part is
256 bits, and the comparison of hashes is constant-time. The bootstrap operator key is whatever
string the operator set, so a bearer that does not parse is checked against it alone.
"""

from __future__ import annotations

import secrets
from collections.abc import Callable
from dataclasses import dataclass

from service.store import KeyRecord, secret_matches

from .errors import Forbidden, NotFound, Unauthorized

KeyLoader = Callable[[str], KeyRecord | None]

BOOTSTRAP_KEY_ID = "operator-bootstrap"
_PREFIX = "mxl_"
_KEY_ID_LENGTH = 16


def new_secret() -> tuple[str, str]:
    key_id = secrets.token_hex(_KEY_ID_LENGTH // 2)
    return key_id, f"{_PREFIX}{key_id}_{secrets.token_urlsafe(32)}"


def key_id_of(secret: str) -> str:
    if secret.startswith(_PREFIX) and len(secret) > len(_PREFIX) + _KEY_ID_LENGTH + 1:
        key_id = secret[len(_PREFIX) : len(_PREFIX) + _KEY_ID_LENGTH]
        if secret[len(_PREFIX) + _KEY_ID_LENGTH] == "_":
            return key_id
    return BOOTSTRAP_KEY_ID


@dataclass(frozen=True)
class Caller:
    key_id: str
    role: str
    plan_id: str | None

    def require(self, plan_id: str, *roles: str) -> None:
        """404 for another plan (it must not learn the plan exists), then 403 for the wrong role."""
        if self.role == "operator":
            return
        if self.plan_id != plan_id:
            raise NotFound(f"plan {plan_id!r} not found")
        if self.role not in roles:
            raise Forbidden(f"a {self.role} key may not do this; it needs one of: {', '.join(roles)}")

    def require_operator(self) -> None:
        if self.role != "operator":
            raise Forbidden(f"a {self.role} key may not do this; it needs the operator role")


class KeyRing:
    """Recognises bearers. Keys are never changed once issued, so a hit is cached for the process."""

    def __init__(self) -> None:
        self._known: dict[str, KeyRecord] = {}

    def lookup(self, key_id: str, load: KeyLoader) -> KeyRecord | None:
        record = self._known.get(key_id)
        if record is None:
            record = load(key_id)
            if record is not None:
                self._known[key_id] = record
        return record

    def caller(self, authorization: str | None, load: KeyLoader) -> Caller:
        if not authorization:
            raise Unauthorized("missing Authorization: Bearer <key>", headers={"WWW-Authenticate": "Bearer"})
        scheme, _, secret = authorization.partition(" ")
        secret = secret.strip()
        if scheme.lower() != "bearer" or not secret:
            raise Unauthorized("Authorization must be 'Bearer <key>'", headers={"WWW-Authenticate": "Bearer"})
        record = self.lookup(key_id_of(secret), load)
        if record is None or not secret_matches(secret, record.secret_hash):
            raise Unauthorized("unknown or wrong key", headers={"WWW-Authenticate": "Bearer"})
        return Caller(record.key_id, record.role, record.plan_id)


__all__ = ["BOOTSTRAP_KEY_ID", "Caller", "KeyLoader", "KeyRing", "key_id_of", "new_secret"]
