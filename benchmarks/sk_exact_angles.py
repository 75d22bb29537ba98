"""Exact optimal SK angles p = 12..16 for the bath optimizer's measurements.

Writes benchmarks/data/sk_exact_angles.json: for SK (xi = x^2/2) and p = 13..P the optimal
(gamma, beta) and V_p* found by leadline's exact optimizer (kernels/optimize.py, gradient-tol
1e-7, no extra starts), each depth from INTERP of the previous one, starting from the exact
p = 12 optimum of benchmarks/data/bath_angles.json (p = 1..12 are copied from there).
bench_bath_optimize.py starts every bath depth p from INTERP of the exact p - 1 optimum in
this file and compares with the exact V_p*.  Resumable: depths already in the file are kept.

Usage:  OMP_NUM_THREADS=1 nice -n 5 python benchmarks/sk_exact_angles.py [--max-p 16]
"""

from __future__ import annotations

import argparse
import json
import os
import time

HERE = os.path.dirname(os.path.abspath(__file__))
SOURCE = os.path.join(HERE, "data", "bath_angles.json")
OUT = os.path.join(HERE, "data", "sk_exact_angles.json")


def main(argv=None) -> None:
    from leadline.kernels.mixture import parse_mixture
    from leadline.kernels.optimize import optimize_depth

    ap = argparse.ArgumentParser()
    ap.add_argument("--max-p", type=int, default=16)
    args = ap.parse_args(argv)
    if os.path.exists(OUT):
        with open(OUT) as fh:
            data = json.load(fh)
    else:
        with open(SOURCE) as fh:
            data = {"xi": "2:0.5", "depths": json.load(fh)["sk"]["depths"]}
    mix = parse_mixture(data["xi"])
    depths = data["depths"]
    for p in range(2, args.max_p + 1):
        if str(p) in depths:
            continue
        prev = depths[str(p - 1)]
        c0, t0 = time.process_time(), time.perf_counter()
        res = optimize_depth(mix, p, previous=(prev["gamma"], prev["beta"]), previous_value=prev["value"],
                             restarts=0, gtol=1e-7)
        depths[str(p)] = {"value": float(res.value), "gamma": [float(x) for x in res.gamma],
                          "beta": [float(x) for x in res.beta], "gradient_norm": float(res.gradient_norm),
                          "evaluations": int(res.evaluations), "cpu_s": time.process_time() - c0}
        print(f"p = {p}: V* = {res.value:.10f}, gradient norm {res.gradient_norm:.1e}, {res.evaluations} evaluations, "
              f"{time.process_time() - c0:.0f} CPU s, {time.perf_counter() - t0:.0f} s wall", flush=True)
        with open(OUT + ".tmp", "w") as fh:
            json.dump(data, fh, indent=1)
        os.replace(OUT + ".tmp", OUT)


if __name__ == "__main__":
    main()
