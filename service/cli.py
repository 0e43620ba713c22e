"""The `mixline` command: serve, demo, migrate, audit verify."""

from __future__ import annotations

import argparse
import sys
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


def _demo(settings: Settings, host: str, port: int) -> None:
    import json

    from service.allocation import build_policy
    from service.api.auth import new_secret
    from service.api.metrics import Metrics
    from service.api.schemas import MixIn
    from service.api.state import AppState
    from service.demo import DEMO_ALLOCATION, DEMO_MIX, DEMO_PLAN
    from service.store import (
        get_plan,
        insert_key,
        insert_plan,
        secret_hash,
    )

    db = _database(settings)
    db.upgrade()
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
    created, doc = state.mixes.publish(plan, MixIn.model_validate(DEMO_MIX), "demo-setup")
    state.mixes.activate(plan.plan_id, DEMO_MIX["version"], "demo-setup")
    secrets_by_role = {}
    with db.writing() as s:
        for role in ("committee", "portal", "operator"):
            key_id, secret = new_secret()
            scope = None if role == "operator" else plan.plan_id
            insert_key(s, key_id=key_id, plan_id=scope, role=role, secret_hash=secret_hash(secret))
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
    print("\ntry:")
    print(f"  curl -s -X POST {base}/v1/plans/{plan.plan_id}/allocations \\\n"
          f"    -H 'Authorization: Bearer {secrets_by_role['portal']}' -H 'Content-Type: application/json' \\\n"
          f"    -d '{json.dumps(DEMO_ALLOCATION)}'")
    print("\nAll figures are invented demo assumptions; a split is not individual advice.\n", flush=True)
    _serve(settings, host, port, migrate=True)


def _audit_verify(settings: Settings, plan_id: str | None) -> int:
    from sqlalchemy import text

    from service.store import verify_chain

    db = _database(settings)
    if plan_id:
        plans = [plan_id]
    else:
        with db.reading() as s:
            plans = [row[0] for row in s.execute(text("SELECT plan_id FROM plans ORDER BY plan_id"))]
    bad = 0
    for pid in plans:
        report = verify_chain(db, pid)
        if report.ok:
            print(f"{pid}: ok, {report.checked} rows, head {report.head_hash}")
        else:
            bad += 1
            fb = report.first_bad
            assert fb is not None
            print(f"{pid}: BROKEN after {report.checked} rows: seq {fb.seq} allocation {fb.allocation_id}: {fb.reason}")
    db.close()
    return 1 if bad else 0


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
    verify = audit_sub.add_parser("verify", help="verify every plan's hash chain (exit 1 if any is broken)")
    verify.add_argument("--plan", default=None)
    args = parser.parse_args(argv)
    settings = Settings()
    if args.command == "serve":
        _serve(settings, args.host, args.port, migrate=not args.no_migrate)
    elif args.command == "demo":
        _demo(settings, args.host, args.port)
    elif args.command == "migrate":
        db = _database(settings)
        try:
            db.upgrade()  # idempotent: a re-run at head changes nothing
        finally:
            db.close()
        print("migrations applied")
    elif args.command == "audit":
        return _audit_verify(settings, args.plan)
    return 0


if __name__ == "__main__":
    sys.exit(main())
