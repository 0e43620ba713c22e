"""Benchmark: the exact frontier of security-level mixes (dense and factor-model risk).

    .venv/bin/python bench/frontier.py [--quick] [--cvxpy-points 10] [--no-server] [--singles 3]
                                       [--no-in-process]

Problems (seeded, invented): N securities on k factors (a market factor with positive
loadings, k - 1 style factors, a correlated factor covariance, specific volatilities 5-25 %),
expected returns = risk-free rate + factor premia + noise, long only, every weight capped at
2.5 / N (so hundreds of caps bind along the frontier). "dense" gives the same numbers as the
n x n covariance B F B' + D, "factor" as the factor model itself.

1. In-process, best of a few repeats (one BLAS thread): tangency (exact active set), minimum
   variance, the whole frontier (critical line corners); outside the timing, the largest KKT
   residual over all corners and the gap between the frontier's best Sharpe ratio and the
   tangency's.
2. The exact 100-point frontier at N = 1,000 (dense) against cvxpy + Clarabel at default
   settings solving the same 100 target returns (minimum variance at each; the problem is
   built once with a cvxpy Parameter, so each point costs one solve). cvxpy solves
   ``--cvxpy-points`` of the 100 targets, evenly spread, and its time per point is scaled to
   100 (all 100 take ~2 minutes of both cores); ours computes all 100. Target >= 50x.
3. Over HTTP (``mixline serve`` on a fresh SQLite file): POST the mix, then at once GET its
   frontier with 100 points; "ready" is the time from sending the POST to receiving the
   frontier. Targets: 2,000-asset factor model <= 1.0 s (moonshot 0.5 s), 1,000-asset dense
   <= 1.0 s. Floors in the same run: the same POST again (parse, hash, lookup, stored answer)
   and the same GET again (the frontier known: sampling and the JSON answer).
4. Single allocations (wrk, 16 connections, ``--singles`` seconds) on the same server,
   alone, beside a busy loop at the frontier process's niceness (the floor: what any CPU work
   on the other core costs them, none of it the service's), and while 2,000-asset factor-model
   mixes are published and their frontiers solved back to back. Target: p99 <= 15 ms.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
import warnings
from pathlib import Path
from typing import Any

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np
import numpy.typing as npt
import orjson

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from allocations import OPERATOR, Server, call, wrk

from service.api.state import FRONTIER_PROCESS_NICE
from service.demo import DEMO_MIX
from service.numerics import (
    MixInputs,
    build_inputs,
    efficient_frontier,
    min_variance,
    tangency,
)
from service.numerics.frontier import best_sharpe_on_frontier, corner_kkt_residuals

FloatArray = npt.NDArray[np.float64]
RISK_FREE_RATE = 0.02


def factor_parts(n: int, k: int, seed: int) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    rng = np.random.default_rng(seed)
    b = rng.normal(size=(n, k)) * (0.15 / np.sqrt(np.arange(1, k + 1)))
    b[:, 0] = np.abs(b[:, 0]) + 0.05
    a = rng.normal(size=(k, k))
    f = 0.5 * np.eye(k) + 0.5 * (a @ a.T) / k
    d = rng.uniform(0.05, 0.25, n)
    premia = 0.3 * np.abs(rng.normal(size=k)) / np.sqrt(np.arange(1, k + 1))
    mu = RISK_FREE_RATE + b @ premia + rng.normal(0.0, 0.02, n)
    return mu, b, f, d


def mix_body(n: int, k: int, seed: int, form: str, version: str) -> dict[str, Any]:
    mu, b, f, d = factor_parts(n, k, seed)
    body: dict[str, Any] = {
        "version": version,
        "assets": [{"code": f"S{i:04d}", "expected_return": float(mu[i])} for i in range(n)],
        "risk_free_rate": RISK_FREE_RATE,
        "bounds": {f"S{i:04d}": [0.0, 2.5 / n] for i in range(n)},
        "cross_check": False,
    }
    if form == "factor":
        body["factor_model"] = {"loadings": b.tolist(), "factor_covariance": f.tolist(), "specific_volatility": d.tolist()}
    else:
        body["covariance"] = (b @ f @ b.T + np.diag(d ** 2)).tolist()
    return body


def inputs_of(body: dict[str, Any]) -> MixInputs:
    return build_inputs(
        [a["code"] for a in body["assets"]], [a["expected_return"] for a in body["assets"]], body["risk_free_rate"],
        covariance=body.get("covariance"), factor_model=body.get("factor_model"),
        bounds={c: (lo, hi) for c, (lo, hi) in body["bounds"].items()},
    )


def best_of(fn: Any, repeats: int) -> tuple[float, Any]:
    best, out = float("inf"), None
    for _ in range(repeats):
        start = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - start)
    return best, out


def best_cpu(fn: Any, repeats: int) -> float:
    """Best process CPU time (less moved by other work on a shared machine than wall time)."""
    best = float("inf")
    for _ in range(repeats):
        start = time.process_time()
        fn()
        best = min(best, time.process_time() - start)
    return best


def in_process(repeats: int) -> None:
    print(f"1. in-process (best of {repeats})")
    header = (f"{'case':>22} {'tangency ms':>12} {'min var ms':>11} {'frontier ms':>12} {'(CPU ms)':>9} "
              f"{'corners':>8} {'max corner KKT':>15} {'Sharpe gap':>11}")
    print(header)
    for n, k, form in ((1000, 20, "dense"), (1000, 20, "factor"), (2000, 20, "factor"), (2000, 50, "factor")):
        inputs = inputs_of(mix_body(n, k, 1, form, "x"))
        t_tan, (best, _) = best_of(lambda: tangency(inputs), repeats)
        t_mv, _ = best_of(lambda: min_variance(inputs), repeats)
        t_fr, frontier = best_of(lambda: efficient_frontier(inputs), repeats)
        cpu_fr = best_cpu(lambda: efficient_frontier(inputs), repeats)
        kkt = float(corner_kkt_residuals(frontier, inputs).max())
        top = best_sharpe_on_frontier(frontier, inputs) if n <= 1000 or form == "factor" else best.weights
        var = inputs.risk.variance(top)
        gap = best.sharpe_ratio - (float(inputs.expected_returns @ top) - RISK_FREE_RATE) / np.sqrt(var)
        print(f"{f'{form} N={n} k={k}':>22} {t_tan * 1e3:>12.1f} {t_mv * 1e3:>11.1f} {t_fr * 1e3:>12.1f} "
              f"{cpu_fr * 1e3:>9.1f} "
              f"{frontier.corner_returns.size:>8} {kkt:>15.1e} {gap:>11.1e}", flush=True)


def against_cvxpy(cvxpy_points: int) -> None:
    import cvxpy as cp

    warnings.simplefilter("ignore")
    print(f"\n2. exact 100-point frontier at N = 1000 (dense) against cvxpy + Clarabel ({cvxpy_points} of the 100 solved)")
    inputs = inputs_of(mix_body(1000, 20, 1, "dense", "x"))

    def ours() -> list[Any]:
        return efficient_frontier(inputs).sample(100, inputs)

    t_ours, points = best_of(ours, 3)
    targets = np.array([p.expected_return for p in points])
    w = cp.Variable(inputs.n)
    target = cp.Parameter()
    problem = cp.Problem(cp.Minimize(cp.quad_form(w, cp.psd_wrap(inputs.covariance))),
                         [cp.sum(w) == 1, w >= inputs.lower, w <= inputs.upper, inputs.expected_returns @ w == target])
    chosen = np.unique(np.linspace(0, 99, cvxpy_points).round().astype(int))
    gaps, worse, seconds, spills, excess = [], 0, [], [], []
    for i in chosen:
        target.value = float(targets[i])
        start = time.perf_counter()
        problem.solve(solver=cp.CLARABEL)
        seconds.append(time.perf_counter() - start)
        ref = np.asarray(w.value)
        gaps.append(float(np.max(np.abs(ref - points[i].weights))))
        # How far the interior-point answer is from feasible (a slightly infeasible point can
        # have a lower variance than the exact minimum).
        spills.append(max(abs(float(inputs.expected_returns @ ref) - float(targets[i])), abs(float(ref.sum()) - 1.0),
                          float(np.max(inputs.lower - ref)), float(np.max(ref - inputs.upper))))
        ours_var, ref_var = inputs.risk.variance(points[i].weights), inputs.risk.variance(ref)
        worse += int(ours_var > ref_var)
        excess.append((ours_var - ref_var) / ref_var)
    # The first solve includes cvxpy's problem build; count it like the others (a user pays it once).
    per_point = float(np.mean(seconds))
    print(f"ours: {t_ours * 1e3:.1f} ms for all 100 points (critical line + sampling)")
    print(f"cvxpy + Clarabel: {per_point * 1e3:.1f} ms per point (first {seconds[0] * 1e3:.0f} ms with the build), "
          f"x100 = {per_point * 100:.1f} s; ratio {per_point * 100 / t_ours:.0f}x (target >= 50x)")
    print(f"max |w_ours - w_cvxpy| {max(gaps):.1e}; ours has the higher variance at {worse} of {len(chosen)} points, "
          f"by at most {max(excess):.1e} relative (cvxpy's largest constraint violation {max(spills):.1e})")


def over_http(repeats: int, singles: int) -> None:
    print("\n3. over HTTP (mixline serve, SQLite)")
    with tempfile.TemporaryDirectory(prefix="mixline-frontier-") as tmp:
        server = Server(f"sqlite:///{tmp}/frontier.db", Path(tmp))
        try:
            call(server.base, "POST", "/v1/plans", OPERATOR, {"plan_id": "bench", "name": "Bench", "currency": "USD"})
            keys = {}
            for role in ("committee", "portal"):
                _, body = call(server.base, "POST", "/v1/plans/bench/keys", OPERATOR, {"role": role})
                keys[role] = orjson.loads(body)["secret"]
            for n, k, form in ((2000, 20, "factor"), (1000, 20, "dense")):
                publish, ready, again, known = [], [], [], []
                size = 0
                for r in range(repeats):
                    version = f"{form}-{n}-{r}"
                    raw = orjson.dumps(mix_body(n, k, 100 + r, form, version))
                    size = len(raw)
                    start = time.perf_counter()
                    status, answer = call(server.base, "POST", "/v1/plans/bench/mixes", keys["committee"], raw)
                    publish.append(time.perf_counter() - start)
                    assert status == 201, answer[:300]
                    status, answer = call(server.base, "GET", f"/v1/plans/bench/mixes/{version}/frontier?points=100&corners=false",
                                          keys["committee"])
                    ready.append(time.perf_counter() - start)
                    assert status == 200, answer[:300]
                    start = time.perf_counter()
                    status, _ = call(server.base, "POST", "/v1/plans/bench/mixes", keys["committee"], raw)
                    again.append(time.perf_counter() - start)
                    assert status == 200
                    start = time.perf_counter()
                    call(server.base, "GET", f"/v1/plans/bench/mixes/{version}/frontier?points=100&corners=false", keys["committee"])
                    known.append(time.perf_counter() - start)
                ms = lambda xs: ", ".join(f"{1e3 * x:.0f}" for x in xs)
                print(f"{form} N={n} k={k} ({size / 1e6:.1f} MB body): publish answered {ms(publish)} ms; "
                      f"frontier (100 points) ready {ms(ready)} ms after the POST (target <= 1000)")
                print(f"    floors: same POST again {ms(again)} ms; same GET again {ms(known)} ms", flush=True)
            if singles > 0 and shutil.which("wrk"):
                during_frontier(server, keys, singles, Path(tmp))
        finally:
            server.stop()


def during_frontier(server: Server, keys: dict[str, str], seconds: int, workdir: Path) -> None:
    print(f"\n4. single allocations (wrk, 16 connections, {seconds} s)")
    status, body = call(server.base, "POST", "/v1/plans/bench/mixes", keys["committee"], DEMO_MIX | {"cross_check": False})
    assert status in (200, 201), body
    call(server.base, "POST", f"/v1/plans/bench/mixes/{DEMO_MIX['version']}/activate", keys["committee"])
    script = workdir / "single.lua"
    script.write_text(
        'wrk.method = "POST"\n'
        f"wrk.body = '{json.dumps({'member_id': 'm-bench', 'mix_version': DEMO_MIX['version'], 'amount': '48250.00', 'preference': {'risk_aversion': 4}})}'\n"
        'wrk.headers["Content-Type"] = "application/json"\n'
        f'wrk.headers["Authorization"] = "Bearer {keys["portal"]}"\n'
    )
    url = f"{server.base}/v1/plans/bench/allocations"
    wrk(url, 1, script)  # warm-up
    alone = wrk(url, seconds, script)
    print(f"alone: {alone['rps']:.0f} req/s, p50 {alone['p50_ms']:.1f} ms, p99 {alone['p99_ms']:.1f} ms")
    # The floor for "while frontiers are solved": a busy loop at the frontier process's niceness,
    # none of the service's work, using the other core as a frontier does.
    hog = subprocess.Popen([sys.executable, "-c", f"import os, time\nos.nice({FRONTIER_PROCESS_NICE})\n"
                            f"end = time.monotonic() + {seconds + 2}\nwhile time.monotonic() < end: sum(range(10_000))"])
    try:
        time.sleep(0.2)
        floor = wrk(url, seconds, script)
    finally:
        hog.kill()
        hog.wait()
    print(f"floor, beside a niced busy loop: {floor['rps']:.0f} req/s, p50 {floor['p50_ms']:.1f} ms, "
          f"p99 {floor['p99_ms']:.1f} ms")
    for label, pause in (("back to back", 0.0), ("one every ~1.5 s", 1.0)):
        # Seeds of their own: the same content again would find its frontier solved already.
        bodies = [orjson.dumps(mix_body(2000, 20, 500 + int(1000 * pause) + r, "factor", f"busy-{pause}-{r}"))
                  for r in range(20)]
        publishing: list[float] = []
        solving: list[float] = []
        stop = threading.Event()

        def committee(bodies: list[bytes] = bodies, pause: float = pause, publishing: list[float] = publishing,
                      solving: list[float] = solving, stop: threading.Event = stop) -> None:
            for r, raw in enumerate(bodies):
                if stop.is_set():
                    return
                start = time.perf_counter()
                call(server.base, "POST", "/v1/plans/bench/mixes", keys["committee"], raw)
                answered = time.perf_counter()
                call(server.base, "GET", f"/v1/plans/bench/mixes/busy-{pause}-{r}/frontier?points=5&corners=false", keys["committee"])
                publishing.append(answered - start)
                solving.append(time.perf_counter() - answered)
                stop.wait(pause)

        worker = threading.Thread(target=committee)
        worker.start()
        time.sleep(0.2)
        busy = wrk(url, seconds, script)
        stop.set()
        worker.join()
        print(f"{label}: {len(solving)} publications of 2,000-asset factor mixes (publish {np.median(publishing) * 1e3:.0f} ms, "
              f"then frontier {np.median(solving) * 1e3:.0f} ms, medians): {busy['rps']:.0f} req/s, "
              f"p50 {busy['p50_ms']:.1f} ms, p99 {busy['p99_ms']:.1f} ms (target p99 <= 15 ms)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true", help="fewer repeats")
    parser.add_argument("--cvxpy-points", type=int, default=10, help="how many of the 100 targets cvxpy solves")
    parser.add_argument("--no-server", action="store_true", help="skip the HTTP parts")
    parser.add_argument("--singles", type=int, default=3, help="seconds of wrk per single-allocation run (0 skips)")
    parser.add_argument("--no-in-process", action="store_true", help="skip part 1 (the in-process timings)")
    args = parser.parse_args()
    if not args.no_in_process:
        in_process(2 if args.quick else 4)
    if args.cvxpy_points > 0:
        against_cvxpy(args.cvxpy_points)
    if not args.no_server:
        over_http(2 if args.quick else 3, args.singles)


if __name__ == "__main__":
    main()
