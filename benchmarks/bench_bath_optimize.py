"""Bath optimizer past exact reach: SK optimal V_p* for p = 12..17, each from INTERP of p - 1.

Starts from the exact optimum at p = 11 (benchmarks/data/bath_angles.json, found by leadline's
exact optimizer), optimizes p = 12 with the bath optimizer from INTERP of it, then p = 13 from
INTERP of the bath p = 12 optimum, and so on: the chain a sweep with ``bath-from = 12`` runs.
Each depth is compared with the published optimum to 4 decimals (Basso, Farhi, Marwaha,
Villalonga, Zhou, arXiv:2110.14206, Table 1: 0.6490 0.6561 0.6623 0.6679 0.6729 0.6773 for
p = 12..17).  "cpu_s" are CPU seconds of the process (time.process_time, single-threaded BLAS),
one process, evaluations in process.

--compare P: the same depth P from INTERP of the exact p - 1 optimum with all 2p angles
(one stage) against a smooth start (stages q, p): evaluations and CPU to the optimum.

Usage:  OMP_NUM_THREADS=1 python benchmarks/bench_bath_optimize.py [--quick] [--pmax 17]
        [--tolerance 1e-6] [--json FILE] [--compare P]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
ANGLES = os.path.join(HERE, "data", "bath_angles.json")
#: arXiv:2110.14206 (Basso, Farhi, Marwaha, Villalonga, Zhou), Table 1, SK optimal V_p to 4 decimals
PUBLISHED = {12: 0.6490, 13: 0.6561, 14: 0.6623, 15: 0.6679, 16: 0.6729, 17: 0.6773}


def _log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def _optimum(p: int) -> dict:
    with open(ANGLES) as fh:
        return json.load(fh)["sk"]["depths"][str(p)]


def chain(p_first: int, p_last: int, engine: dict, stages=None, log=_log, out_path=None) -> list[dict]:
    from leadline.kernels.bath import optimize_bath_depth
    from leadline.kernels.mixture import parse_mixture

    mix = parse_mixture("2:0.5")
    start = _optimum(p_first - 1)
    previous, previous_value = (start["gamma"], start["beta"]), start["value"]
    rows = []
    for p in range(p_first, p_last + 1):
        c0, w0 = time.process_time(), time.perf_counter()
        r = optimize_bath_depth(mix, p, engine=engine, previous=previous, previous_value=previous_value,
                                stages=None if stages is None else tuple(min(q, p) for q in stages))
        row = {"p": p, "value": r.value, "error_estimate": r.error_estimate, "published": PUBLISHED.get(p),
               "agrees_4_decimals": PUBLISHED.get(p) is not None and round(r.value, 4) == PUBLISHED[p],
               "gradient_norm": r.gradient_norm, "gradient_noise": r.gradient_noise,
               "evaluations": r.evaluations, "gradients": r.gradients, "evaluation_cpu_s": r.evaluation_seconds,
               "cpu_s": time.process_time() - c0, "wall_s": time.perf_counter() - w0, "message": r.message,
               "gamma": [float(x) for x in r.gamma], "beta": [float(x) for x in r.beta]}
        rows.append(row)
        log(f"p = {p}: V = {r.value:.6f} +- {r.error_estimate:.1e} (published {PUBLISHED.get(p)}), "
            f"gradient norm {r.gradient_norm:.1e} (noise {r.gradient_noise:.1e}), {r.evaluations} evaluations "
            f"({r.evaluation_seconds:.2f} CPU s each), {row['cpu_s']:.0f} CPU s, {row['wall_s']:.0f} s wall")
        if out_path:
            with open(out_path, "w") as fh:
                json.dump({"engine": engine, "rows": rows}, fh, indent=1)
        previous, previous_value = (r.gamma, r.beta), r.value
    return rows


def compare(p: int, engine: dict, log=_log) -> list[dict]:
    """All 2p angles against a smooth first stage, from INTERP of the exact p - 1 optimum."""
    from leadline.kernels.bath import optimize_bath_depth
    from leadline.kernels.mixture import parse_mixture

    mix = parse_mixture("2:0.5")
    start, exact = _optimum(p - 1), _optimum(p)
    rows = []
    for stages in ((p,), (max(2, p // 2), p), (3, p)):
        c0 = time.process_time()
        r = optimize_bath_depth(mix, p, engine=engine, previous=(start["gamma"], start["beta"]),
                                previous_value=start["value"], stages=stages)
        row = {"p": p, "stages": list(stages), "error": r.value - exact["value"], "evaluations": r.evaluations,
               "cpu_s": time.process_time() - c0}
        rows.append(row)
        log(f"p = {p} stages {stages}: V - V* = {row['error']:.1e}, {r.evaluations} evaluations, "
            f"{row['cpu_s']:.1f} CPU s")
    return rows


def run(quick: bool = False) -> dict:
    """`make bench`: quick keeps to p = 12 at a small truncation."""
    engine = {"tolerance": 1e-5} if quick else {"tolerance": 1e-6}
    return {"engine": engine, "rows": chain(12, 12 if quick else 17, engine)}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--pmin", type=int, default=12)
    ap.add_argument("--pmax", type=int, default=17)
    ap.add_argument("--tolerance", type=float, default=1e-6)
    ap.add_argument("--compare", type=int, default=None)
    ap.add_argument("--json", default=None)
    args = ap.parse_args(argv)
    engine = {"tolerance": args.tolerance}
    if args.compare:
        out = {"engine": engine, "compare": compare(args.compare, engine)}
    elif args.quick:
        out = run(quick=True)
    else:
        out = {"engine": engine, "rows": chain(args.pmin, args.pmax, engine, out_path=args.json)}
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(out, fh, indent=1)
    print(json.dumps(out, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
