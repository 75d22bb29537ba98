"""Sparse hypertree recursion: evaluation time, peak memory, gradient cost ratio.

Max-3-XORSAT on 4-regular hypergraphs (q = 3, D = 4), depths p = 8..13.  Each depth is one
evaluation (2^(2p+1) paths); the sweep stops after the first depth that takes longer than
``stop_after_s`` (default 3 minutes) and reports the largest depth that ran.  The gradient /
evaluation cost ratio (goal <= 4) is measured at the smaller depths.

Memory: ``rss_mib`` is the process's peak resident size (getrusage) after the call; depths
run in increasing order, so it is that depth's peak.  ``peak_mib`` is the tracemalloc peak,
which counts numpy's temporaries only: the recursion's large buffers are anonymous memory maps
that tracemalloc does not see.

Usage:  python benchmarks/bench_sparse.py [--max-p 13] [--stop-after 180] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import resource
import sys
import time
import tracemalloc

import numpy as np

from leadline.kernels.sparse import evaluate_sparse


def _angles(p: int):
    t = (np.arange(p) + 0.5) / p
    return 0.5 * t + 0.1, 0.5 * (1 - t) + 0.05


def _measure(p: int, q: int, D: int, gradient: bool) -> dict:
    g, b = _angles(p)
    tracemalloc.start()
    t0 = time.perf_counter()
    ev = evaluate_sparse(q, D, g, b, gradient=gradient)
    wall = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return {
        "p": p,
        "paths": 2 ** (2 * p + 1),
        "value": ev.value,
        "seconds": round(wall, 3),
        "peak_mib": round(peak / 2**20, 1),
        "rss_mib": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
        "transforms": ev.transforms,
        "sum_fH": ev.residuals["sum_fH"],
    }


def run(q: int = 3, degree: int = 4, p_min: int = 8, p_max: int = 13, stop_after_s: float = 180.0, gradient_depths=(8, 9, 10)) -> dict:
    """Run the benchmark; returns a JSON-ready dict (also printed by ``__main__``)."""
    evaluations = []
    largest = None
    stopped = None
    for p in range(p_min, p_max + 1):
        r = _measure(p, q, degree, gradient=False)
        evaluations.append(r)
        largest = p
        print(f"evaluate p={p:2d}: {r['seconds']:8.2f} s, peak RSS {r['rss_mib']:8.1f} MiB, value {r['value']:.10f}", flush=True)
        if r["seconds"] > stop_after_s:
            stopped = f"p = {p} took {r['seconds']:.0f} s > {stop_after_s:.0f} s; larger depths not attempted"
            break
    ratios = []
    for p in gradient_depths:
        e = _measure(p, q, degree, gradient=False)
        gr = _measure(p, q, degree, gradient=True)
        ratio = gr["seconds"] / e["seconds"]
        ratios.append({"p": p, "evaluate_s": e["seconds"], "gradient_s": gr["seconds"], "ratio": round(ratio, 2), "gradient_peak_mib": gr["peak_mib"], "transform_ratio": round(gr["transforms"] / e["transforms"], 2)})
        print(f"gradient p={p:2d}: {gr['seconds']:8.2f} s vs {e['seconds']:.2f} s -> ratio {ratio:.2f}, peak {gr['peak_mib']:.1f} MiB", flush=True)
    return {
        "benchmark": "sparse",
        "q": q,
        "degree": degree,
        "evaluations": evaluations,
        "largest_p": largest,
        "stopped": stopped,
        "gradient_ratio": ratios,
        "max_rss_mib": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
        "goal_gradient_ratio": 4.0,
    }


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--max-p", type=int, default=13)
    ap.add_argument("--min-p", type=int, default=8)
    ap.add_argument("--stop-after", type=float, default=180.0, help="seconds; stop after the first slower depth")
    ap.add_argument("--json", default=None, help="also write the result to this file")
    a = ap.parse_args(argv)
    out = run(p_min=a.min_p, p_max=a.max_p, stop_after_s=a.stop_after)
    text = json.dumps(out, indent=2)
    print(text)
    if a.json:
        with open(a.json, "w") as fh:
            fh.write(text + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
