"""Optimal angles (exact iteration) for the bath-engine measurements.

Writes benchmarks/data/bath_angles.json: for each mixture and depth p = 1..P the optimal
(gamma, beta) and V_p* found by leadline's own optimizer (kernels/optimize.py), each depth
warm-started from the previous one.  bench_bath.py reads this file, so the slow part
(optimization) runs once.

Usage:  OMP_NUM_THREADS=1 nice -n 10 python benchmarks/bath_angles.py [--max-p 12]
"""

from __future__ import annotations

import argparse
import json
import os
import time

from leadline.kernels.mixture import parse_mixture
from leadline.kernels.optimize import optimize_depth

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "data", "bath_angles.json")
MIXTURES = {"sk": "2:0.5", "q3": "3:1", "q4": "4:1", "mix24": "2:0.5,4:0.5"}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--max-p", type=int, default=12)
    ap.add_argument("--only", action="append")
    args = ap.parse_args()
    os.makedirs(os.path.dirname(OUT), exist_ok=True)
    data = json.load(open(OUT)) if os.path.exists(OUT) else {}
    for name, spec in MIXTURES.items():
        if args.only and name not in args.only:
            continue
        mix = parse_mixture(spec)
        entry = data.setdefault(name, {"xi": spec, "depths": {}})
        prev = None
        for p in range(1, args.max_p + 1):
            key = str(p)
            if key in entry["depths"]:
                d = entry["depths"][key]
                prev = (d["gamma"], d["beta"])
                continue
            t0 = time.perf_counter()
            res = optimize_depth(mix, p, previous=prev, restarts=None if p <= 4 else 0, gtol=1e-6)
            prev = (list(map(float, res.gamma)), list(map(float, res.beta)))
            entry["depths"][key] = {"value": float(res.value), "gamma": prev[0], "beta": prev[1],
                                    "gradient_norm": float(res.gradient_norm)}
            print(name, p, res.value, f"{time.perf_counter() - t0:.1f}s", flush=True)
            with open(OUT + ".tmp", "w") as fh:
                json.dump(data, fh, indent=1)
            os.replace(OUT + ".tmp", OUT)


if __name__ == "__main__":
    main()
