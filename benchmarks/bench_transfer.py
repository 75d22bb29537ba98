"""Exact instance check of `leadline transfer`: statevector time and peak memory against n.

A dense 2-spin instance (all pairs, Gaussian weights / sqrt(n)) at p = 1 and p = 3, n = 18..24
(``quick``: up to 22; ``--max-n 26`` for the hard limit).  Peak memory is the tracemalloc peak of
the call (numpy reports its buffers), next to the figure the command states before it starts
(:func:`leadline.kernels.finite_size.statevector_bytes`).

Usage:  python benchmarks/bench_transfer.py [--max-n 24] [--json out.json]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
import tracemalloc

import numpy as np

from leadline.kernels.finite_size import Instance, statevector_bytes, statevector_check


def _instance(n: int) -> Instance:
    rng = np.random.default_rng(n)
    terms = {(i, j): float(rng.normal()) / np.sqrt(n) for i in range(n) for j in range(i + 1, n)}
    return Instance(n=n, terms=terms)


def _measure(n: int, p: int) -> dict:
    inst = _instance(n)
    gamma = np.linspace(0.3, 0.6, p)
    beta = np.linspace(0.5, 0.2, p)
    tracemalloc.start()
    t0 = time.perf_counter()
    check = statevector_check(inst, gamma, beta)
    wall = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return {
        "n": n,
        "p": p,
        "seconds": round(wall, 3),
        "peak_mib": round(peak / 2**20, 1),
        "stated_mib": round(statevector_bytes(n) / 2**20, 1),
        "expectation_per_spin": check.expectation / n,
    }


def run(quick: bool = False, max_n: int | None = None) -> dict:
    top = max_n if max_n is not None else (22 if quick else 24)
    rows = [_measure(n, 1) for n in range(18, top + 1, 2)]
    rows.append(_measure(20, 3))
    return {"instance": "dense 2-spin, all pairs", "runs": rows}


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--max-n", type=int, default=24)
    parser.add_argument("--json", default=None)
    args = parser.parse_args()
    result = run(max_n=args.max_n)
    text = json.dumps(result, indent=2)
    if args.json:
        with open(args.json, "w") as fh:
            fh.write(text + "\n")
    sys.stdout.write(text + "\n")
