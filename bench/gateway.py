"""Benchmark: what the gateway (request id, media-type check, access log line) and a key check with
its rate limit add to one request, in process, beside the same request without them.

    .venv/bin/python bench/gateway.py [--requests 50000]

A no-op ASGI app answers 200; the floor is that app called directly. The measured runs wrap it
in Gateway (the access log writing to a file, as in production), then also check a bearer
through KeyRing with both token buckets. Figures are microseconds per request on one core.
"""

from __future__ import annotations

import argparse
import asyncio
import sys
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from service.api.access_log import AccessLog
from service.api.auth import KeyRing
from service.api.gateway import Gateway
from service.api.rate_limits import TokenBuckets
from service.store import KeyRecord, secret_hash

SECRET = "mxl_0123456789abcdef_" + "x" * 43
RECORD = KeyRecord("0123456789abcdef", "plan", "portal", secret_hash(SECRET), datetime.now(UTC))


def scope() -> dict[str, Any]:
    return {
        "type": "http", "method": "POST", "path": "/v1/plans/plan/allocations", "client": ("127.0.0.1", 5000),
        "headers": [(b"host", b"mixline"), (b"authorization", f"Bearer {SECRET}".encode()),
                    (b"content-type", b"application/json"), (b"content-length", b"120")],
    }


async def run(app: Any, n: int) -> float:
    async def receive() -> dict[str, Any]:
        return {"type": "http.request", "body": b"{}", "more_body": False}

    async def send(message: dict[str, Any]) -> None:
        return None

    start = time.perf_counter()
    for _ in range(n):
        await app(scope(), receive, send)
    return (time.perf_counter() - start) / n * 1e6


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--requests", type=int, default=50_000)
    n = parser.parse_args().requests
    ring = KeyRing(requests=TokenBuckets(1e9, 10**9), failures=TokenBuckets(5, 20))

    async def plain(scope: Any, receive: Any, send: Any) -> None:
        await send({"type": "http.response.start", "status": 200, "headers": [(b"content-type", b"application/json")]})
        await send({"type": "http.response.body", "body": b"{}"})

    async def keyed(scope: Any, receive: Any, send: Any) -> None:
        ring.caller(f"Bearer {SECRET}", lambda key_id: RECORD)
        await plain(scope, receive, send)

    with tempfile.TemporaryDirectory() as tmp:
        log = AccessLog(str(Path(tmp) / "access.jsonl"))
        log.start()
        try:
            gated, gated_keyed = Gateway(plain, log), Gateway(keyed, log)
            asyncio.run(run(gated_keyed, 2000))  # warm-up
            floor = asyncio.run(run(plain, n))
            gate = asyncio.run(run(gated, n))
            both = asyncio.run(run(gated_keyed, n))
            log.flush(30)
            lines = len((Path(tmp) / "access.jsonl").read_text().splitlines())
        finally:
            log.close()
    print(f"no-op app alone            {floor:7.2f} us/request")
    print(f"+ gateway (id, 415, log)   {gate:7.2f} us/request  (+{gate - floor:.2f})")
    print(f"+ key check, rate limit    {both:7.2f} us/request  (+{both - floor:.2f})")
    print(f"access log lines written   {lines}")
    print(f"at 2,500 req/s the gateway and key check take {(both - floor) * 2500 / 1e4:.2f} % of one core")


if __name__ == "__main__":
    main()
