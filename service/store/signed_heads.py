"""Signed chain heads: an anchor for a plan's hash chain outside the database.

The chain (chain.py) shows any change to a row, but whoever can write the database could rebuild
every hash from the first changed row on, or cut rows off the end and move the head back. A
head signed with the service's Ed25519 key (``MIXLINE_SIGNING_KEY_FILE``) and kept elsewhere (by
an auditor, in the committee's minutes) settles that: a later chain must still hold that row
with that hash. ``check_against_head`` says whether it does.

What is signed is the text ``mixline-audit-head-v1`` and the plan id, seq, hash and signing time
(RFC 3339), joined by U+001F; the signature is base64 (RFC 4648, with padding). The signing key's
id is the first 16 hex digits of the SHA-256 of its raw 32-byte public key.
"""

from __future__ import annotations

import base64
import hashlib
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import (
    Ed25519PrivateKey,
    Ed25519PublicKey,
)
from sqlalchemy import select, text
from sqlalchemy.orm import Session

from service.store.chain import GENESIS_HASH, SEPARATOR
from service.store.schema import ChainHead
from service.timestamps import parse_rfc3339, rfc3339

ALGORITHM = "Ed25519"
_DOMAIN = "mixline-audit-head-v1"
_FIELDS = ("plan_id", "seq", "hash", "signed_at", "key_id", "signature")


def signed_text(plan_id: str, seq: int, head_hash: str, signed_at: str) -> bytes:
    return SEPARATOR.join((_DOMAIN, plan_id, str(seq), head_hash, signed_at)).encode()


def public_key_id(public_key: Ed25519PublicKey) -> str:
    raw = public_key.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)
    return hashlib.sha256(raw).hexdigest()[:16]


def public_key_pem(public_key: Ed25519PublicKey) -> str:
    return public_key.public_bytes(
        serialization.Encoding.PEM, serialization.PublicFormat.SubjectPublicKeyInfo
    ).decode()


def load_public_key(pem: bytes) -> Ed25519PublicKey:
    """An Ed25519 public key from PEM; a private key's PEM gives its public half."""
    if b"PRIVATE KEY" in pem:
        private = serialization.load_pem_private_key(pem, password=None)
        if not isinstance(private, Ed25519PrivateKey):
            raise ValueError("not an Ed25519 private key")
        return private.public_key()
    public = serialization.load_pem_public_key(pem)
    if not isinstance(public, Ed25519PublicKey):
        raise ValueError("not an Ed25519 public key")
    return public


@dataclass(frozen=True)
class SignedHead:
    plan_id: str
    seq: int
    hash: str
    signed_at: str
    key_id: str
    signature: str

    def to_document(self) -> dict[str, Any]:
        return {name: getattr(self, name) for name in _FIELDS}

    @classmethod
    def from_document(cls, doc: Any) -> SignedHead:
        """Raises ValueError naming what is wrong with an exported head."""
        if not isinstance(doc, dict):
            raise ValueError("a head is a JSON object")
        missing = [name for name in _FIELDS if name not in doc]
        if missing:
            raise ValueError(f"the head lacks {', '.join(missing)}")
        if type(doc["seq"]) is not int or doc["seq"] < 0:
            raise ValueError("seq must be a whole number >= 0")
        for name in ("plan_id", "hash", "signed_at", "key_id", "signature"):
            if not isinstance(doc[name], str):
                raise ValueError(f"{name} must be a string")
        parse_rfc3339(doc["signed_at"])
        return cls(doc["plan_id"], doc["seq"], doc["hash"], doc["signed_at"], doc["key_id"], doc["signature"])

    def signature_valid(self, public_key: Ed25519PublicKey) -> bool:
        try:
            signature = base64.b64decode(self.signature, validate=True)
            public_key.verify(signature, signed_text(self.plan_id, self.seq, self.hash, self.signed_at))
        except (InvalidSignature, ValueError):
            return False
        return True


class HeadSigner:
    """Signs chain heads with one Ed25519 key: from a PEM file, or made for this process only."""

    def __init__(self, private_key: Ed25519PrivateKey, *, ephemeral: bool) -> None:
        self._key = private_key
        self.public_key = private_key.public_key()
        self.key_id = public_key_id(self.public_key)
        self.ephemeral = ephemeral

    @classmethod
    def from_file(cls, path: str | Path) -> HeadSigner:
        key = serialization.load_pem_private_key(Path(path).read_bytes(), password=None)
        if not isinstance(key, Ed25519PrivateKey):
            raise ValueError(f"{path}: not an Ed25519 private key (PEM, PKCS#8)")
        return cls(key, ephemeral=False)

    @classmethod
    def generated(cls) -> HeadSigner:
        return cls(Ed25519PrivateKey.generate(), ephemeral=True)

    def sign(self, plan_id: str, seq: int, head_hash: str, signed_at: datetime) -> SignedHead:
        at = rfc3339(signed_at)
        signature = self._key.sign(signed_text(plan_id, seq, head_hash, at))
        return SignedHead(plan_id, seq, head_hash, at, self.key_id, base64.b64encode(signature).decode())

    def public_document(self) -> dict[str, Any]:
        raw = self.public_key.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)
        return {
            "algorithm": ALGORITHM,
            "key_id": self.key_id,
            "public_key": base64.b64encode(raw).decode(),
            "public_key_pem": public_key_pem(self.public_key),
            "ephemeral": self.ephemeral,
        }


def current_head(session: Session, plan_id: str) -> tuple[int, str]:
    """The plan's last seq and hash as the chain head records them ((0, GENESIS_HASH) if empty)."""
    heads = ChainHead.__table__.c
    row = session.execute(
        select(heads.last_seq, heads.last_hash).where(heads.plan_id == plan_id)
    ).one_or_none()
    return (0, GENESIS_HASH) if row is None else (int(row[0]), str(row[1]))


def check_against_head(session: Session, head: SignedHead) -> str | None:
    """Why the stored chain does not extend ``head`` (cut back, or rebuilt), or None if it does.

    The chain itself is checked by chain.verify_chain; this checks that it still holds the
    signed row: a chain rebuilt from an earlier row on has another hash there.
    """
    last_seq, _ = current_head(session, head.plan_id)
    if last_seq < head.seq:
        return (
            f"the chain was cut back: the signed head is seq {head.seq}, the chain now ends at "
            f"seq {last_seq}"
        )
    if head.seq == 0:
        return None if head.hash == GENESIS_HASH else "a head of seq 0 must carry the genesis hash"
    stored: list[str] = list(session.execute(
        text("SELECT row_hash FROM allocations WHERE plan_id = :p AND seq = :s"),
        {"p": head.plan_id, "s": head.seq},
    ).scalars())
    if len(stored) != 1:
        return f"the chain has {len(stored)} rows of seq {head.seq}; the signed head names one"
    if stored[0] != head.hash:
        return (
            f"the chain was rebuilt: row {head.seq} now hashes to {stored[0][:12]}..., "
            f"the signed head says {head.hash[:12]}..."
        )
    return None


__all__ = [
    "ALGORITHM",
    "HeadSigner",
    "SignedHead",
    "check_against_head",
    "current_head",
    "load_public_key",
    "public_key_id",
    "signed_text",
]
