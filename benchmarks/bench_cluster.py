"""Executor benchmark: in-process vs a 2-worker LocalCluster.

Measures
- LocalCluster start-up (2 worker processes) and close;
- per-pass overhead at p = 6 (a pass there is ~1 ms of work, so the
  LocalCluster time per pass is almost all overhead: submit, transfer, ordered
  reduction), the number behind the auto switch point in cluster/settings.py;
- p = 12 and p = 13 evaluation time (value only, default chunk plan)
  in-process and on the LocalCluster, their ratio, and the whole-evaluation
  throughput in paths per second per core (passes x 2^(2p+1) paths / time / cores).

    .venv/bin/python benchmarks/bench_cluster.py             # p = 12 and 13
    .venv/bin/python benchmarks/bench_cluster.py --quick     # p = 11 and 12
    .venv/bin/python benchmarks/bench_cluster.py --json out.json
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")  # one BLAS thread per core, in this process as in the workers

import argparse
import json
import statistics
import sys
import time

import numpy as np

WORKERS = 2
MIXTURE = "2:0.5"


def _angles(p: int):
    # a smooth schedule of the usual shape (gamma rising, beta falling); any angles cost the same
    t = (np.arange(p) + 0.5) / p
    return 0.2 + 0.4 * t, 0.5 - 0.35 * t


def _timed_eval(p: int, run_pass, repeats: int = 1) -> tuple[float, float, int]:
    from leadline.kernels.exact import evaluate, plan_chunks
    from leadline.kernels.mixture import parse_mixture

    mix = parse_mixture(MIXTURE)
    g, b = _angles(p)
    plan = plan_chunks(p)
    times, value = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        ev = evaluate(mix, g, b, plan=plan, run_pass=run_pass)
        times.append(time.perf_counter() - t0)
        value = ev.value
    return statistics.median(times), value, ev.passes


def run(quick: bool = False, depths=None, log=None) -> dict:
    """Run the measurements; returns a JSON-ready dict."""
    from leadline.cluster import ComputeSettings, InProcessExecutor, start_local_cluster
    from leadline.kernels.exact import plan_chunks

    log = log or (lambda s: print(s, file=sys.stderr, flush=True))
    depths = list(depths or ((11, 12) if quick else (12, 13)))
    out: dict = {"benchmark": "cluster", "workers": WORKERS, "cores": os.cpu_count(), "mixture": MIXTURE}

    inproc = InProcessExecutor()
    # ---- per-pass overhead at p = 6
    reps = 5 if quick else 20
    t_in6, v_in6, passes6 = _timed_eval(6, inproc.run_pass, repeats=reps)

    t0 = time.perf_counter()
    ex = start_local_cluster(ComputeSettings(mode="local", workers=WORKERS).resolved())
    out["local_cluster_start_s"] = time.perf_counter() - t0
    try:
        _timed_eval(6, ex.run_pass)  # warm-up: imports on the workers
        t_lc6, v_lc6, _ = _timed_eval(6, ex.run_pass, repeats=reps)
        out["p6"] = {
            "passes": passes6,
            "inprocess_pass_s": t_in6 / passes6,
            "local_pass_s": t_lc6 / passes6,
            "overhead_per_pass_s": (t_lc6 - t_in6) / passes6,
            "same_value": v_in6 == v_lc6,
        }
        log(f"p = 6: in-process {t_in6 / passes6 * 1e3:.2f} ms/pass, LocalCluster {t_lc6 / passes6 * 1e3:.2f} ms/pass")
        # ---- large depths
        for p in depths:
            plan = plan_chunks(p)
            t_lc, v_lc, passes = _timed_eval(p, ex.run_pass)
            t_in, v_in, _ = _timed_eval(p, inproc.run_pass)
            paths = passes * plan.n_paths
            out[f"p{p}"] = {
                "plan": plan.to_json(),
                "chunks_per_pass": plan.n_chunks,
                "passes": passes,
                "inprocess_s": t_in,
                "local_s": t_lc,
                "speedup_local_over_inprocess": t_in / t_lc,
                "paths_per_s_per_core_inprocess": paths / t_in,
                "paths_per_s_per_core_local": paths / t_lc / WORKERS,
                "abs_value_difference": abs(v_in - v_lc),
            }
            log(f"p = {p}: in-process {t_in:.2f} s, LocalCluster({WORKERS}) {t_lc:.2f} s, "
                f"ratio {t_in / t_lc:.2f}, {paths / t_in:.3g} paths/s/core in-process")
    finally:
        t0 = time.perf_counter()
        ex.close()
        out["local_cluster_close_s"] = time.perf_counter() - t0
    try:
        out["load_average_1min_at_end"] = os.getloadavg()[0]
    except OSError:
        pass
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="p = 11 and 12 instead of 12 and 13")
    ap.add_argument("--depth", type=int, action="append", help="depth to time (repeatable)")
    ap.add_argument("--json", help="also write the result to this file")
    args = ap.parse_args(argv)
    result = run(quick=args.quick, depths=args.depth)
    text = json.dumps(result, indent=1, default=float)
    print(text)
    if args.json:
        with open(args.json, "w") as fh:
            fh.write(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
