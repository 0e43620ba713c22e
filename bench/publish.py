"""Benchmark: publishing a 200-asset risky mix over HTTP without cross-checks.

    .venv/bin/python bench/publish.py [--assets 200] [--repeats 8]

Starts `mixline serve` on a fresh SQLite file and publishes new versions of a seeded, invented
200-asset mix (3-factor covariance, long-only, every weight capped at 5 %), timing each POST
end to end over loopback. Beside it, in the same run: the same request sent again for an
already published version (parse, validate, canonical hash, lookup and the stored answer:
everything but the solve) as the floor, and the publish-time solve in-process (tangency and
minimum variance; the exact frontier is solved just after the answer, off the request, and the
time until a frontier GET answers is reported too). Target: under 50 ms per publish.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import orjson

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from allocations import OPERATOR, Server, call

from service.numerics import build_inputs, solve_mix


def mix_body(n: int, version: str, seed: int = 200) -> dict[str, object]:
    rng = np.random.default_rng(seed)
    loadings = rng.normal(size=(n, 3)) * [0.15, 0.08, 0.05]
    cov = loadings @ loadings.T + np.diag(rng.uniform(0.01, 0.05, n) ** 2)
    mu = 0.02 + loadings @ np.array([0.06, 0.04, 0.02]) + rng.normal(0, 0.01, n)
    return {
        "version": version,
        "assets": [{"code": f"A{i:03d}", "expected_return": float(mu[i])} for i in range(n)],
        "covariance": cov.tolist(),
        "risk_free_rate": 0.02,
        "bounds": {f"A{i:03d}": [0.0, 0.05] for i in range(n)},
        "cross_check": False,
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--assets", type=int, default=200)
    parser.add_argument("--repeats", type=int, default=8)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="mixline-publish-") as tmp:
        server = Server(f"sqlite:///{tmp}/publish.db", Path(tmp))
        try:
            call(server.base, "POST", "/v1/plans", OPERATOR, {"plan_id": "bench", "name": "Bench", "currency": "USD"})
            _, key_body = call(server.base, "POST", "/v1/plans/bench/keys", OPERATOR, {"role": "committee"})
            key = orjson.loads(key_body)["secret"]
            publish, ready, repeat = [], [], []
            for k in range(args.repeats):
                # A new version each time: the seed moves the numbers, so nothing is cached.
                raw = orjson.dumps(mix_body(args.assets, f"v{k}", seed=200 + k))
                start = time.perf_counter()
                status, answer = call(server.base, "POST", "/v1/plans/bench/mixes", key, raw)
                publish.append(time.perf_counter() - start)
                assert status == 201, answer[:300]
                # The frontier is solved just after publication; wait for it (committees publish a
                # few times a year, so the next call never races it in practice).
                start = time.perf_counter()
                status, _ = call(server.base, "GET", f"/v1/plans/bench/mixes/v{k}/frontier?points=5", key)
                ready.append(time.perf_counter() - start)
                assert status == 200
                start = time.perf_counter()
                status, _ = call(server.base, "POST", "/v1/plans/bench/mixes", key, raw)
                repeat.append(time.perf_counter() - start)
                assert status == 200
        finally:
            server.stop()
    solves = []
    for k in range(args.repeats):
        body = mix_body(args.assets, "x", seed=200 + k)
        inputs = build_inputs(
            [a["code"] for a in body["assets"]],  # type: ignore[index]
            [a["expected_return"] for a in body["assets"]],  # type: ignore[index]
            0.02, covariance=body["covariance"], bounds={c: (0.0, 0.05) for c in body["bounds"]},  # type: ignore[arg-type]
        )
        start = time.perf_counter()
        solve_mix(inputs, cross_check=False, frontier=False)
        solves.append(time.perf_counter() - start)
    ms = lambda xs: 1000 * statistics.median(xs)
    print("publish times ms:", [round(1000 * x, 1) for x in publish])
    print(f"publish {args.assets} assets, no cross-checks: median {ms(publish):.1f} ms (min {1000 * min(publish):.1f}); "
          f"target < 50 ms")
    print(f"floor (same request again, no solve): median {ms(repeat):.1f} ms; the solve in-process "
          f"(tangency + minimum variance): median {ms(solves):.1f} ms; frontier ready after: median {ms(ready):.1f} ms")
    print(f"ratio publish / floor: {statistics.median(publish) / statistics.median(repeat):.2f}")


if __name__ == "__main__":
    main()
