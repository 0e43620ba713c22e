"""Benchmark: the impact of a candidate version on 300,000 members, beside its floor, same run.

    .venv/bin/python bench/impact.py [--members 300000]

Starts `mixline serve` on a fresh SQLite file, logs one batch of N members under the active
version, publishes a candidate, then times POST .../mixes/{candidate}/impact over HTTP. Floor:
reading those members' latest records (the same query, through the store, in this process).
Target: <= 5 s at 300,000 members.
"""

from __future__ import annotations

import argparse
import copy
import json
import sys
import tempfile
import time
from pathlib import Path

import orjson

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from allocations import PLAN, Server, call, members, seed

from service.demo import DEMO_MIX
from service.store import Database, latest_allocations


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--members", type=int, default=300_000)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="mixline-impact-") as tmp:
        url = f"sqlite:///{tmp}/impact.db"
        server = Server(url, Path(tmp))
        try:
            keys = seed(server)
            body = orjson.dumps({"mix_version": DEMO_MIX["version"], "members": members(args.members)})
            status, answer = call(server.base, "POST", f"/v1/plans/{PLAN}/allocations/batch", keys["portal"], body)
            assert status == 201, answer[:300]
            candidate = copy.deepcopy(DEMO_MIX) | {"version": "candidate", "cross_check": False}
            for a in candidate["assets"]:
                a["expected_return"] = round(a["expected_return"] - 0.005, 4)
            status, answer = call(server.base, "POST", f"/v1/plans/{PLAN}/mixes", keys["committee"], candidate)
            assert status == 201, answer[:300]
            started = time.perf_counter()
            status, answer = call(server.base, "POST", f"/v1/plans/{PLAN}/mixes/candidate/impact", keys["committee"])
            seconds = time.perf_counter() - started
            assert status == 200, answer[:300]
            out = orjson.loads(answer)
            db = Database(url)
            try:
                started = time.perf_counter()
                with db.reading() as s:
                    rows = latest_allocations(s, PLAN, DEMO_MIX["version"])
                floor = time.perf_counter() - started
            finally:
                db.close()
            assert len(rows) == out["members"] == args.members
            print(json.dumps({"members": out["members"], "impact_seconds": seconds, "floor_read_seconds": floor,
                              "ratio": seconds / floor, "target_seconds": 5.0,
                              "risky_fraction_change": out["risky_fraction_change"]}, indent=2))
        finally:
            server.stop()


if __name__ == "__main__":
    main()
