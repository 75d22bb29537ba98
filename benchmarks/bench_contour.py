"""Growing contour + global flip against the full-contour baseline, in one run.

Every measurement runs in a fresh Python process (peak RSS is its own) with one
BLAS thread (per-core figures).  Baseline and new runs are interleaved, so a ratio
compares runs taken under the same machine load; quote the medians.

* dense evaluation, SK (xi = x^2/2), p = 12..14: CPU time of the growing contour
  (default) and of the full contour (``contour="full"``, no flip), their ratio;
* gradient / evaluation CPU-time ratio, p = 10..16;
* deep evaluations: p = 16 and p = 18 (CPU, wall, peak RSS); p = 20 with ``--p20``
  (about a quarter of an hour on one core; the README records it);
* sparse Max-3-XORSAT (D = 4): growing against the full recursion at p = 10..12
  (3 growing runs interleaved with 3 full runs at p = 10, with one at p = 11, 12: the full
  recursion takes ~2.5 min at p = 12), the sparse gradient / evaluation ratio, and the
  growing recursion alone at p = 13 (p = 14 with ``--sparse-p14``; 3 runs each).

Usage:  python benchmarks/bench_contour.py [--quick] [--p20] [--sparse-p14] [--only-sparse] [--json out.json]
(``make bench`` calls ``run()``.)
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time

SINGLE_THREAD_ENV = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}


def _angles(p: int):
    import numpy as np

    t = (np.arange(p) + 0.5) / p
    return 0.6 * t + 0.1, 0.5 * (1 - t) + 0.05


def _one(spec: dict) -> dict:
    """One measurement in this process."""
    import resource

    import numpy as np

    kind, p = spec["kind"], int(spec["p"])
    g, b = _angles(p)
    if kind == "dense":
        from leadline.kernels.exact import evaluate, plan_chunks
        from leadline.kernels.mixture import parse_mixture

        mix = parse_mixture("2:0.5")
        contour = spec.get("contour", "growing")
        plan = plan_chunks(p, flip=(contour == "growing"))

        def fn():
            return evaluate(mix, g, b, plan=plan, contour=contour, gradient=spec.get("gradient", False))
    else:
        from leadline.kernels.sparse import evaluate_sparse

        contour = spec.get("contour", "growing")

        def fn():
            return evaluate_sparse(3, 4, g / np.sqrt(4), b, contour=contour, gradient=spec.get("gradient", False))

    t0, c0 = time.perf_counter(), time.process_time()
    ev = fn()
    return {
        **spec,
        "wall_s": time.perf_counter() - t0,
        "cpu_s": time.process_time() - c0,
        "value": ev.value,
        "path_visits": getattr(ev, "path_visits", None),
        "peak_rss_bytes": int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024,
    }


def _spawn(spec: dict, log) -> dict:
    env = {**os.environ, **SINGLE_THREAD_ENV}
    cmd = [sys.executable, os.path.abspath(__file__), "--one", json.dumps(spec)]
    out = subprocess.run(cmd, capture_output=True, text=True, env=env)
    if out.returncode != 0:
        return {**spec, "error": out.stderr.strip().splitlines()[-1] if out.stderr.strip() else f"exit {out.returncode}"}
    res = json.loads(out.stdout.strip().splitlines()[-1])
    log(f"  {spec}: cpu {res['cpu_s']:.3f} s, wall {res['wall_s']:.3f} s, rss {res['peak_rss_bytes'] / 2**20:.0f} MiB")
    return res


def _median(rows, key="cpu_s"):
    vals = [r[key] for r in rows if key in r]
    return statistics.median(vals) if vals else None


def _pair(a: dict, b: dict, reps: int, log) -> tuple[list, list]:
    """Interleave reps of two measurements (same load for both)."""
    ra, rb = [], []
    for _ in range(reps):
        ra.append(_spawn(a, log))
        rb.append(_spawn(b, log))
    return ra, rb


def run(quick: bool = False, p20: bool = False, sparse_p14: bool = False, only_sparse: bool = False, log=None) -> dict:
    log = log or (lambda s: print(s, file=sys.stderr, flush=True))
    reps = 3
    out: dict = {"dense_vs_full": [], "gradient_ratio": [], "deep": [], "sparse_vs_full": [], "sparse_deep": []}
    if only_sparse:
        return _sparse(out, quick, sparse_p14, reps, log, only_sparse)
    for p in ((12, 13) if quick else (12, 13, 14)):
        new, old = _pair({"kind": "dense", "p": p}, {"kind": "dense", "p": p, "contour": "full"}, reps, log)
        out["dense_vs_full"].append({
            "p": p, "growing_cpu_s": _median(new), "full_cpu_s": _median(old),
            "speedup": _median(old) / _median(new), "value_difference": abs(new[0]["value"] - old[0]["value"]),
            "growing_rss_mib": max(r["peak_rss_bytes"] for r in new) / 2**20,
            "full_rss_mib": max(r["peak_rss_bytes"] for r in old) / 2**20,
        })
    for p in ((10, 12) if quick else (10, 12, 14, 16)):
        ev, gr = _pair({"kind": "dense", "p": p}, {"kind": "dense", "p": p, "gradient": True}, 1 if p >= 16 else reps, log)
        out["gradient_ratio"].append({"p": p, "evaluation_cpu_s": _median(ev), "gradient_cpu_s": _median(gr),
                                      "ratio": _median(gr) / _median(ev)})
    deep = [] if quick else [(16, 3), (18, 1)]
    if p20:
        deep.append((20, 1))
    for p, n in deep:
        rows = [_spawn({"kind": "dense", "p": p}, log) for _ in range(n)]
        out["deep"].append({"p": p, "cpu_s": _median(rows), "wall_s": _median(rows, "wall_s"),
                            "peak_rss_mib": max(r["peak_rss_bytes"] for r in rows) / 2**20,
                            "path_visits": rows[0]["path_visits"], "value": rows[0]["value"]})
    return _sparse(out, quick, sparse_p14, reps, log, False)


def _sparse(out, quick, sparse_p14, reps, log, only_sparse) -> dict:
    if only_sparse:
        out = {"sparse_vs_full": [], "sparse_gradient_ratio": [], "sparse_deep": []}
    out["sparse_gradient_ratio"] = []
    for p in ((10,) if quick else (10, 11, 12)):
        n_full = reps if p <= 10 else 1
        new, old = [], []
        for i in range(reps):  # growing runs interleaved with the (fewer) full runs
            new.append(_spawn({"kind": "sparse", "p": p}, log))
            if i < n_full:
                old.append(_spawn({"kind": "sparse", "p": p, "contour": "full"}, log))
        out["sparse_vs_full"].append({
            "p": p, "growing_cpu_s": _median(new), "full_cpu_s": _median(old), "speedup": _median(old) / _median(new),
            "growing_runs": len(new), "full_runs": len(old),
            "value_difference": abs(new[0]["value"] - old[0]["value"]),
            "growing_rss_mib": max(r["peak_rss_bytes"] for r in new) / 2**20,
            "full_rss_mib": max(r["peak_rss_bytes"] for r in old) / 2**20,
        })
    for p in ((10,) if quick else (10, 12)):
        ev, gr = _pair({"kind": "sparse", "p": p}, {"kind": "sparse", "p": p, "gradient": True}, reps, log)
        out["sparse_gradient_ratio"].append({"p": p, "evaluation_cpu_s": _median(ev), "gradient_cpu_s": _median(gr),
                                             "ratio": _median(gr) / _median(ev),
                                             "gradient_rss_mib": max(r["peak_rss_bytes"] for r in gr) / 2**20})
    for p in (() if quick else ((13, 14) if sparse_p14 else (13,))):
        rows = [_spawn({"kind": "sparse", "p": p}, log) for _ in range(reps)]
        ok = [r for r in rows if "cpu_s" in r]
        out["sparse_deep"].append({"p": p, "runs": len(ok), "cpu_s": _median(ok), "wall_s": _median(ok, "wall_s"),
                                   "cpu_s_all": [r["cpu_s"] for r in ok],
                                   "peak_rss_mib": max((r["peak_rss_bytes"] for r in ok), default=0) / 2**20,
                                   "value": ok[0]["value"] if ok else None,
                                   "error": next((r["error"] for r in rows if "error" in r), None)})
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--one", help=argparse.SUPPRESS)
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--p20", action="store_true", help="also one evaluation at p = 20")
    ap.add_argument("--sparse-p14", action="store_true", help="also the sparse recursion at p = 14 (about 5 GiB, 3 runs)")
    ap.add_argument("--only-sparse", action="store_true", help="only the sparse measurements")
    ap.add_argument("--json", help="write the result here")
    args = ap.parse_args(argv)
    if args.one:
        print(json.dumps(_one(json.loads(args.one))))
        return 0
    res = run(quick=args.quick, p20=args.p20, sparse_p14=args.sparse_p14, only_sparse=args.only_sparse)
    text = json.dumps(res, indent=1, default=float)
    if args.json:
        with open(args.json, "w") as fh:
            fh.write(text)
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
