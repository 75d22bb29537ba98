"""Bosonic-bath engine: error against the exact V_p, bond dimension needed, wall time.

At the optimal angles of benchmarks/data/bath_angles.json (found by leadline's exact
optimizer; regenerate with benchmarks/bath_angles.py) for SK (2:0.5), pure q = 3, pure q = 4 and
the 2+4 mixture 2:0.5,4:0.5, the bath engine's V_p is compared with the exact optimum V_p*:

* errors:    |V_bath - V_p*| at fixed truncations (Fock levels d, bond cap chi), p = 2..P
* chi_1e-6:  the smallest chi of a ladder with |error| <= 1e-6 (Fock levels fixed)
* bases:     principal (step-by-step, eigenmodes) against Cholesky (one sweep), same (d, chi)
* growth:    wall time and the two-truncation error estimate beyond exact reach, with angles
             interpolated from the deepest optimum (INTERP), fixed (d, chi)

run(quick=True) (used by `make bench --quick`) keeps to small depths; the tables in
docs/bath.md come from `python benchmarks/bench_bath.py --full --json FILE` (about half an hour
on one core).  "seconds" are CPU seconds of the process (time.process_time, single-threaded
BLAS), so a busy machine does not inflate them; "wall_s" is the wall-clock time.

Usage:  OMP_NUM_THREADS=1 python benchmarks/bench_bath.py [--quick | --full] [--json FILE]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time

import numpy as np

from leadline.kernels.bath import evaluate_bath, run_bath
from leadline.kernels.mixture import parse_mixture
from leadline.kernels.optimize import interpolate_angles

HERE = os.path.dirname(os.path.abspath(__file__))
ANGLES = os.path.join(HERE, "data", "bath_angles.json")
MIXTURES = ("sk", "q3", "q4", "mix24")


def _log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def load_angles() -> dict:
    with open(ANGLES) as fh:
        return json.load(fh)


def _case(angles: dict, name: str, p: int):
    """(mixture, gamma, beta, exact V_p): the optimum if stored, else INTERP angles from the
    deepest stored optimum with V_p from the exact iteration."""
    mix = parse_mixture(angles[name]["xi"])
    if str(p) in angles[name]["depths"]:
        e = angles[name]["depths"][str(p)]
        return mix, np.array(e["gamma"]), np.array(e["beta"]), float(e["value"])
    top = max(int(k) for k in angles[name]["depths"])
    g, b = (np.array(angles[name]["depths"][str(top)][k]) for k in ("gamma", "beta"))
    while g.size < p:
        g, b = interpolate_angles(g, b)
    from leadline.kernels.iteration import evaluate

    return mix, g, b, evaluate(mix, g, b).value


def _one(mix, g, b, exact, d, chi, basis="cholesky", tail=None, reverse=None) -> dict:
    c0 = time.process_time()
    r = run_bath(mix, g, b, fock=d, tail=d if tail is None else tail, chi=chi, basis=basis, reverse=reverse)
    return {"d": d, "tail": d if tail is None else tail, "chi": chi, "basis": basis,
            "order": r.to_json()["mode_order"], "value": r.value,
            "error": None if exact is None else abs(r.value - exact), "max_bond": r.max_bond,
            "discarded": r.discarded, "steps": r.steps, "seconds": round(time.process_time() - c0, 3),
            "wall_s": round(r.wall_time, 3)}


def error_table(angles, names, ps, truncations, record) -> list:
    rows = []
    for name in names:
        for p in ps:
            if str(p) not in angles[name]["depths"]:
                continue
            mix, g, b, exact = _case(angles, name, p)
            for d, chi in truncations:
                row = {"mixture": name, "p": p, "exact": exact, **_one(mix, g, b, exact, d, chi)}
                rows.append(row)
                _log(f"errors {name} p={p:2d} d={d:2d} chi={chi:3d}: err {row['error']:.2e} bond {row['max_bond']} "
                     f"disc {row['discarded']:.1e} {row['seconds']:.1f}s")
                record()
    return rows


def chi_needed(angles, names, ps, d, ladder, target, record, stop_after_s=300.0) -> list:
    rows = []
    for name in names:
        for p in ps:
            mix, g, b, exact = _case(angles, name, p)
            found, tried = None, []
            for chi in ladder:
                r = _one(mix, g, b, exact, d, chi)
                tried.append({"chi": chi, "error": r["error"], "max_bond": r["max_bond"], "discarded": r["discarded"],
                              "seconds": r["seconds"]})
                if r["error"] <= target:
                    found = chi
                    break
                if r["seconds"] > stop_after_s:
                    break
            rows.append({"mixture": name, "p": p, "d": d, "target": target, "chi": found, "tried": tried})
            _log(f"chi_needed {name} p={p:2d}: chi {found} ({tried[-1]['error']:.1e}, {tried[-1]['seconds']:.1f}s)")
            record()
    return rows


def basis_table(angles, names, ps, settings, record) -> list:
    rows = []
    for name in names:
        for p in ps:
            mix, g, b, exact = _case(angles, name, p)
            for basis, reverse, d, tail, chi in settings:
                row = {"mixture": name, "p": p, **_one(mix, g, b, exact, d, chi, basis=basis, tail=tail, reverse=reverse)}
                rows.append(row)
                _log(f"basis {name} p={p} {basis} {row['order']} d={d}/{tail} chi={chi}: err {row['error']:.2e} "
                     f"{row['seconds']:.1f}s")
                record()
    return rows


def growth_table(angles, names, ps, d, chi, record, stop_after_s) -> list:
    rows = []
    for name in names:
        depths = sorted(int(k) for k in angles[name]["depths"])
        top = depths[-1]
        g, b = (np.array(x) for x in (angles[name]["depths"][str(top)]["gamma"], angles[name]["depths"][str(top)]["beta"]))
        mix = parse_mixture(angles[name]["xi"])
        for p in ps:
            while g.size < p:
                g, b = interpolate_angles(g, b)
            t0 = time.process_time()
            res = evaluate_bath(mix, g[:p], b[:p], fock=d, tail=d, chi=chi, basis="cholesky")
            wall = time.process_time() - t0
            rows.append({"mixture": name, "p": p, "d": d, "chi": chi, "value": res.value,
                         "error_estimate": res.error_estimate, "check_value": res.check.value,
                         "max_bond": res.check.max_bond, "discarded": res.check.discarded,
                         "seconds_small": round(res.check.wall_time, 2), "seconds_both": round(wall, 2)})
            _log(f"growth {name} p={p}: V {res.value:.8f} +- {res.error_estimate:.1e} ({res.check.wall_time:.1f}s + {res.run.wall_time:.1f}s)")
            record()
            if wall > stop_after_s:
                break
    return rows


SECTIONS = ("chi", "errors", "bases", "growth")


def run(quick: bool = False, full: bool = False, out_path: str | None = None, sections=SECTIONS) -> dict:
    """Run the measurements; returns a JSON-ready dict."""
    angles = load_angles()
    result = {"benchmark": "bath", "quick": quick, "full": full}

    def record():
        if out_path:
            with open(out_path + ".tmp", "w") as fh:
                json.dump(result, fh, indent=1, default=float)
            os.replace(out_path + ".tmp", out_path)

    if quick:
        result["errors"] = error_table(angles, ("sk", "q3"), range(2, 7), [(8, 16)], record)
        result["chi_needed"] = chi_needed(angles, ("sk",), range(2, 7), 10, (4, 8, 16, 32), 1e-6, record)
        result["bases"] = basis_table(angles, ("sk",), (4,), [("cholesky", True, 12, 12, 16), ("principal", False, 16, 4, 16)], record)
        return result
    pmax = 12 if full else 9
    if "chi" in sections:
        result["chi_needed"] = chi_needed(angles, ("sk", "q3"), range(2, pmax + (3 if full else 1)), 10,
                                          (4, 6, 8, 12, 16, 24, 32, 48, 64, 96), 1e-6, record)
    if "errors" in sections:
        result["errors"] = error_table(angles, MIXTURES, range(2, pmax + 1, 2 if full else 1),
                                       [(8, 16), (10, 32), (12, 64)], record)
    if "bases" in sections:
        result["bases"] = basis_table(angles, ("sk",), (4, 6, 8) if full else (4, 6),
                                      [(basis, rev, d, tail, chi) for chi in (8, 16, 32)
                                       for basis, d, tail in (("cholesky", 12, 12), ("principal", 20, 4))
                                       for rev in (True, False)], record)
    if full and "growth" in sections:
        result["growth"] = growth_table(angles, ("sk", "q3"), (12, 16, 20, 24, 28, 32), 8, 16, record, stop_after_s=600)
    return result


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--full", action="store_true", help="p up to 12, basis comparison to p = 8, growth beyond exact reach")
    ap.add_argument("--json", default=None, help="write the result to this file (updated after every measurement)")
    ap.add_argument("--section", action="append", choices=SECTIONS, help="only these parts (repeatable)")
    a = ap.parse_args(argv)
    out = run(quick=a.quick, full=a.full, out_path=a.json, sections=a.section or SECTIONS)
    print(json.dumps(out, default=float))
    return 0


if __name__ == "__main__":
    sys.exit(main())
