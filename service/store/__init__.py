"""mixline's store: plans, API keys, risky-mix versions and the hash-chained allocation log.

Public surface only; the modules behind it are private. SQLite (one file) and
PostgreSQL are both supported through the same calls.
"""

from service.store.chain import GENESIS_HASH, verify_chain
from service.store.database import Database
from service.store.errors import Conflict
from service.store.idempotency import (
    IdempotencyLeaseLost,
    IdempotencyRecord,
    KeyRelease,
    KeyReservation,
)
from service.store.key_secrets import secret_hash, secret_matches
from service.store.records import (
    BadRow,
    ChainReport,
    Finished,
    IdempotencyCompletion,
    KeyRecord,
    LogBatch,
    LogStream,
    MixLifecycle,
    MixRecord,
    PlanRecord,
)
from service.store.repository import (
    get_allocation,
    get_frontier,
    get_key,
    get_mix,
    get_plan,
    insert_frontier,
    insert_key,
    insert_mix,
    insert_plan,
    latest_allocations,
    list_allocations,
    list_keys,
    list_lifecycle,
    lock_lifecycle,
    record_activation,
    record_retirement,
    revoke_key,
    upsert_key,
)
from service.store.schema import json_text
from service.store.signed_heads import (
    HeadSigner,
    SignedHead,
    check_against_head,
    current_head,
    load_public_key,
)
from service.store.writer import ChainWriter

__all__ = [
    "json_text",
    "GENESIS_HASH",
    "BadRow",
    "ChainReport",
    "ChainWriter",
    "Conflict",
    "Database",
    "Finished",
    "HeadSigner",
    "IdempotencyCompletion",
    "IdempotencyLeaseLost",
    "IdempotencyRecord",
    "KeyRecord",
    "KeyRelease",
    "KeyReservation",
    "LogBatch",
    "LogStream",
    "MixLifecycle",
    "MixRecord",
    "PlanRecord",
    "SignedHead",
    "check_against_head",
    "current_head",
    "get_allocation",
    "get_frontier",
    "get_key",
    "get_mix",
    "get_plan",
    "insert_frontier",
    "insert_key",
    "insert_mix",
    "insert_plan",
    "latest_allocations",
    "list_allocations",
    "list_keys",
    "load_public_key",
    "revoke_key",
    "list_lifecycle",
    "lock_lifecycle",
    "record_activation",
    "record_retirement",
    "secret_hash",
    "secret_matches",
    "upsert_key",
    "verify_chain",
]
