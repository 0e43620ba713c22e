"""The `mixline` command: serve, demo, migrate, audit verify."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from types import FrameType
from typing import TYPE_CHECKING, Any

from service.settings import Settings

if TYPE_CHECKING:
    from service.store import Database


def _database(settings: Settings) -> Database:
    from service.store import Database

    return Database(
        settings.database_url, pool_size=settings.db_pool_size, max_overflow=settings.db_max_overflow
    )


# How long uvicorn lets requests in progress finish after SIGTERM; deploy/kubernetes gives the
# pod terminationGracePeriodSeconds = preStop sleep + this + time to flush the log writer.
GRACEFUL_SHUTDOWN_SECONDS = 25


def _serve(settings: Settings, host: str, port: int, migrate: bool) -> None:
    import uvicorn

    from service.api import create_app

    app = create_app(settings, migrate=migrate)
    config = uvicorn.Config(
        app, host=host, port=port, log_level="info", access_log=False,
        timeout_graceful_shutdown=GRACEFUL_SHUTDOWN_SECONDS,
    )
    draining_server(config).run()


def draining_server(config: Any) -> Any:
    """A uvicorn Server that marks the app not ready the moment a stop signal arrives, before
    uvicorn starts waiting for the requests in progress (the lifespan's shutdown comes later)."""
    import uvicorn

    class DrainingServer(uvicorn.Server):
        def handle_exit(self, sig: int, frame: FrameType | None) -> None:
            config.app.state.mixline.shutting_down = True
            super().handle_exit(sig, frame)

    return DrainingServer(config)


DEMO_DATABASE_URL = "sqlite:///./mixline-demo.db"
# The demo's keys stop working a day after they were printed.
DEMO_KEY_DAYS = 1


def demo_refusal(settings: Settings) -> str | None:
    """Why `mixline demo` may not run against these settings, or None.

    The demo prints an operator key: it must never seed one into a database that serves real
    plans, so it runs only on a local SQLite file that holds nothing but the demo plan.
    """
    from sqlalchemy.engine import make_url

    if settings.environment == "production":
        return "MIXLINE_ENVIRONMENT is production; the demo seeds keys anyone reading the terminal can use"
    url = make_url(settings.database_url)
    if url.get_backend_name() != "sqlite" or url.host or not url.database or url.database == ":memory:":
        return (f"the demo runs only on a local SQLite file, not {url.render_as_string(hide_password=True)!r}; "
                f"unset MIXLINE_DATABASE_URL to use {DEMO_DATABASE_URL}")
    return None


def _demo(settings: Settings, host: str, port: int) -> int:
    import json
    from datetime import timedelta

    import orjson
    from sqlalchemy import text

    from service.allocation import build_policy
    from service.api.auth import new_secret
    from service.api.metrics import Metrics
    from service.api.state import AppState
    from service.demo import DEMO_MEMBERS, DEMO_MIX, DEMO_PLAN
    from service.store import (
        get_plan,
        insert_key,
        insert_plan,
        secret_hash,
    )
    from service.timestamps import rfc3339, utc_now

    if "database_url" not in settings.model_fields_set:
        # Not the file `mixline serve` uses by default: demo keys stay out of it.
        settings = settings.model_copy(update={"database_url": DEMO_DATABASE_URL})
    refusal = demo_refusal(settings)
    if refusal is not None:
        print(f"mixline demo: refused: {refusal}", file=sys.stderr)
        return 2
    db = _database(settings)
    db.upgrade()
    with db.reading() as s:
        others = [row[0] for row in s.execute(text("SELECT plan_id FROM plans WHERE plan_id <> :p"), {"p": DEMO_PLAN["plan_id"]})]
    if others:
        db.close()
        print(f"mixline demo: refused: {settings.database_url} holds other plans ({', '.join(others[:3])}); "
              "the demo seeds keys only into a database of its own", file=sys.stderr)
        return 2
    with db.writing() as s:
        if get_plan(s, DEMO_PLAN["plan_id"]) is None:
            policy = build_policy(**DEMO_PLAN["policy"])
            insert_plan(
                s, plan_id=DEMO_PLAN["plan_id"], name=DEMO_PLAN["name"],
                currency=DEMO_PLAN["currency"], policy=policy.to_document(),
            )
    state = AppState(settings, db, Metrics())
    plan = state.plan(DEMO_PLAN["plan_id"])
    # Published and activated by the demo's own set-up, not by a key.
    created, doc = state.mixes.publish(plan, orjson.dumps(DEMO_MIX), "demo-setup")
    state.mixes.activate(plan.plan_id, DEMO_MIX["version"], "demo-setup")
    secrets_by_role = {}
    expires_at = utc_now() + timedelta(days=DEMO_KEY_DAYS)
    with db.writing() as s:
        for role in ("committee", "portal", "operator"):
            key_id, secret = new_secret()
            scope = None if role == "operator" else plan.plan_id
            insert_key(s, key_id=key_id, plan_id=scope, role=role, secret_hash=secret_hash(secret), expires_at=expires_at)
            secrets_by_role[role] = secret
    db.close()
    t = doc["tangency"]
    base = f"http://{host}:{port}"
    print(f"demo plan   {plan.plan_id} ({plan.name}), database {settings.database_url}")
    print(f"mix         {DEMO_MIX['version']} content_hash {doc['content_hash'][:16]}... "
          f"({'published now' if created else 'already published'}, active)")
    print(f"tangency    E[r] {t['expected_return']:.4f}  vol {t['volatility']:.4f}  Sharpe {t['sharpe_ratio']:.4f}")
    print(f"committee key  {secrets_by_role['committee']}")
    print(f"portal key     {secrets_by_role['portal']}")
    print(f"operator key   {secrets_by_role['operator']}  (demo only: every plan)")
    print(f"(these keys expire at {rfc3339(expires_at)})")
    print("\ntry (a member with a risk aversion, one the glide path and income decide, one with drifted holdings):")
    for member in DEMO_MEMBERS:
        print(f"  curl -s -X POST {base}/v1/plans/{plan.plan_id}/allocations \\\n"
              f"    -H 'Authorization: Bearer {secrets_by_role['portal']}' -H 'Content-Type: application/json' \\\n"
              f"    -d '{json.dumps(member)}'")
    print("\nAll figures are invented demo assumptions; a split is not individual advice.\n", flush=True)
    _serve(settings, host, port, migrate=True)
    return 0


def _audit_verify(settings: Settings, plan_id: str | None, head_file: str | None, public_key_file: str | None) -> int:
    """Exit 0 when every chain checked verifies (and extends the signed head, if one is given);
    1 when one does not; 2 when the check cannot be made (unknown plan, bad head file, no key)."""
    import json

    from sqlalchemy import text

    from service.store import (
        SignedHead,
        check_against_head,
        get_plan,
        load_public_key,
        verify_chain,
    )

    head: SignedHead | None = None
    if head_file is not None:
        try:
            head = SignedHead.from_document(json.loads(Path(head_file).read_text()))
        except (OSError, ValueError) as error:
            print(f"{head_file}: not a signed head: {error}", file=sys.stderr)
            return 2
        if plan_id is not None and plan_id != head.plan_id:
            print(f"{head_file} is the head of plan {head.plan_id!r}, not {plan_id!r}", file=sys.stderr)
            return 2
        plan_id = head.plan_id
        key_source = public_key_file or settings.signing_key_file
        if not key_source:
            print("no key to check the head's signature: give --public-key FILE (the PEM of "
                  "GET /v1/audit/signing-key) or set MIXLINE_SIGNING_KEY_FILE", file=sys.stderr)
            return 2
        try:
            public_key = load_public_key(Path(key_source).read_bytes())
        except (OSError, ValueError) as error:
            print(f"{key_source}: not an Ed25519 key: {error}", file=sys.stderr)
            return 2
        if not head.signature_valid(public_key):
            print(f"{plan_id}: BAD SIGNATURE: the head in {head_file} was not signed by the key in "
                  f"{key_source} (key id {head.key_id}), or was changed after signing")
            return 1

    db = _database(settings)
    try:
        if plan_id:
            with db.reading() as s:
                if get_plan(s, plan_id) is None:
                    print(f"{plan_id}: no such plan in this database", file=sys.stderr)
                    return 2
            plans = [plan_id]
        else:
            with db.reading() as s:
                plans = [row[0] for row in s.execute(text("SELECT plan_id FROM plans ORDER BY plan_id"))]
        bad = 0
        for pid in plans:
            report = verify_chain(db, pid)
            if not report.ok:
                bad += 1
                fb = report.first_bad
                assert fb is not None
                print(f"{pid}: BROKEN after {report.checked} rows: seq {fb.seq} allocation {fb.allocation_id}: {fb.reason}")
                continue
            if head is not None:
                with db.reading() as s:
                    fault = check_against_head(s, head)
                if fault is not None:
                    bad += 1
                    print(f"{pid}: DOES NOT EXTEND THE SIGNED HEAD (seq {head.seq}, signed {head.signed_at}): {fault}")
                    continue
                print(f"{pid}: ok, {report.checked} rows, head {report.head_hash}; extends the head "
                      f"signed {head.signed_at} at seq {head.seq}")
                continue
            print(f"{pid}: ok, {report.checked} rows, head {report.head_hash}")
    finally:
        db.close()
    return 1 if bad else 0


def _audit_head(settings: Settings, plan_id: str) -> int:
    """Print the plan's chain head signed with MIXLINE_SIGNING_KEY_FILE (for keeping elsewhere)."""
    import json

    from service.store import HeadSigner, current_head, get_plan
    from service.timestamps import utc_now

    if not settings.signing_key_file:
        print("MIXLINE_SIGNING_KEY_FILE is unset: a head signed by an ephemeral key could never be checked",
              file=sys.stderr)
        return 2
    signer = HeadSigner.from_file(settings.signing_key_file)
    db = _database(settings)
    try:
        with db.reading() as s:
            if get_plan(s, plan_id) is None:
                print(f"{plan_id}: no such plan in this database", file=sys.stderr)
                return 2
            seq, head_hash = current_head(s, plan_id)
    finally:
        db.close()
    print(json.dumps(signer.sign(plan_id, seq, head_hash, utc_now()).to_document(), indent=2))
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="mixline", description=__doc__)
    sub = parser.add_subparsers(dest="command", required=True)
    for name in ("serve", "demo"):
        p = sub.add_parser(name, help="run the HTTP service" if name == "serve" else "seed a demo plan and serve")
        p.add_argument("--host", default="127.0.0.1")
        p.add_argument("--port", type=int, default=8000)
        if name == "serve":
            p.add_argument("--no-migrate", action="store_true", help="do not apply migrations at start-up")
    sub.add_parser("migrate", help="apply database migrations up to the newest")
    audit = sub.add_parser("audit", help="audit log tools")
    audit_sub = audit.add_subparsers(dest="audit_command", required=True)
    verify = audit_sub.add_parser(
        "verify", help="verify every plan's hash chain (exit 1 if any is broken, 2 if it cannot be checked)"
    )
    verify.add_argument("--plan", default=None)
    verify.add_argument("--head", default=None, metavar="FILE",
                        help="a signed head exported earlier (GET .../audit/head): fail if the chain no longer extends it")
    verify.add_argument("--public-key", default=None, metavar="FILE",
                        help="PEM of the signing key (GET /v1/audit/signing-key); default: MIXLINE_SIGNING_KEY_FILE")
    head = audit_sub.add_parser("head", help="print a plan's chain head signed with MIXLINE_SIGNING_KEY_FILE")
    head.add_argument("--plan", required=True)
    args = parser.parse_args(argv)
    settings = Settings()
    if args.command == "serve":
        _serve(settings, args.host, args.port, migrate=not args.no_migrate)
    elif args.command == "demo":
        return _demo(settings, args.host, args.port)
    elif args.command == "migrate":
        db = _database(settings)
        try:
            db.upgrade()  # idempotent: a re-run at head changes nothing
        finally:
            db.close()
        print("migrations applied")
    elif args.command == "audit" and args.audit_command == "head":
        return _audit_head(settings, args.plan)
    elif args.command == "audit":
        return _audit_verify(settings, args.plan, args.head, args.public_key)
    return 0


if __name__ == "__main__":
    sys.exit(main())
