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
    from leadline.kernels.exact import evaluate

    return mix, g, b, evaluate(mix, g, b).value


def _one(mix, g, b, exact, d, chi, basis="cholesky", tail=None, reverse=None) -> dict:
    c0 = time.process_time()
    r = run_bath(mix, g, b, fock=d, tail=d if tail is None else tail, chi=chi, basis=basis, reverse=reverse)
    return {"d": d, "tail": d if tail is None else tail, "chi": chi, "basis": basis,
            "order": r.to_json()["mode_order"], "value": r.value,
            "error": None if exact is None else abs(r.value - exact), "largest_bond": r.largest_bond,
            "discarded": r.discarded, "steps": r.steps, "seconds": round(time.process_time() - c0, 3),
            "wall_s": round(r.wall_time, 3)}


def error_table(angles, names, ps, truncations, record, result_rows=None) -> list:
    rows = result_rows if result_rows is not None else []
    for name in names:
        for p in ps:
            if str(p) not in angles[name]["depths"]:
                continue
            mix, g, b, exact = _case(angles, name, p)
            for d, chi in truncations:
                row = {"mixture": name, "p": p, "exact": exact, **_one(mix, g, b, exact, d, chi)}
                rows.append(row)
                _log(f"errors {name} p={p:2d} d={d:2d} chi={chi:3d}: err {row['error']:.2e} bond {row['largest_bond']} "
                     f"disc {row['discarded']:.1e} {row['seconds']:.1f}s")
                record()
    return rows


def chi_needed(angles, names, ps, d, ladder, target, record, stop_after_s=300.0, result_rows=None) -> list:
    rows = result_rows if result_rows is not None else []
    for name in names:
        for p in ps:
            mix, g, b, exact = _case(angles, name, p)
            found, tried = None, []
            for chi in ladder:
                r = _one(mix, g, b, exact, d, chi)
                tried.append({"chi": chi, "error": r["error"], "largest_bond": r["largest_bond"], "discarded": r["discarded"],
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


def basis_table(angles, names, ps, settings, record, result_rows=None) -> list:
    rows = result_rows if result_rows is not None else []
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


def growth_table(angles, names, ps, d, chi, record, stop_after_s, result_rows=None) -> list:
    rows = result_rows if result_rows is not None else []
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
                         "largest_bond": res.check.largest_bond, "discarded": res.check.discarded,
                         "seconds_small": round(res.check.wall_time, 2), "seconds_both": round(wall, 2)})
            _log(f"growth {name} p={p}: V {res.value:.8f} +- {res.error_estimate:.1e} ({res.check.wall_time:.1f}s + {res.run.wall_time:.1f}s)")
            record()
            if wall > stop_after_s:
                break
    return rows


def deep_table(angles, names, ps, d, ladder, record, stop_after_s, fock_check_max_p=20, result_rows=None) -> list:
    """Beyond the stored optima: INTERP angles, a chi ladder at fixed d, each value compared
    with the largest chi that ran (a self-reference: it tells how fast V converges in chi);
    plus the largest chi at d + 4 levels, to show the Fock cut-off is not what limits."""
    rows = result_rows if result_rows is not None else []
    for name in names:
        top = max(int(k) for k in angles[name]["depths"])
        g0, b0 = (np.array(angles[name]["depths"][str(top)][k]) for k in ("gamma", "beta"))
        mix = parse_mixture(angles[name]["xi"])
        for p in ps:
            g, b = g0, b0
            while g.size < p:
                g, b = interpolate_angles(g, b)
            runs = []
            for chi in ladder:
                r = _one(mix, g, b, None, d, chi)
                runs.append(r)
                _log(f"deep {name} p={p} d={d} chi={chi}: V {r['value']:.12f} bond {r['largest_bond']} disc {r['discarded']:.1e} "
                     f"{r['seconds']:.1f}s")
                if r["seconds"] > stop_after_s:
                    break
            more_d = None
            if p <= fock_check_max_p:
                more_d = _one(mix, g, b, None, d + 4, runs[-1]["chi"])
                _log(f"deep {name} p={p} d={d + 4} chi={runs[-1]['chi']}: V {more_d['value']:.12f} {more_d['seconds']:.1f}s")
            ref = runs[-1]["value"]
            for r in runs:
                r["diff_to_largest"] = abs(r["value"] - ref)
            rows.append({"mixture": name, "p": p, "d": d, "runs": runs, "more_fock": more_d,
                         "fock_diff": None if more_d is None else abs(more_d["value"] - ref)})
            record()
            if runs[-1]["seconds"] > stop_after_s:
                break
    return rows


SECTIONS = ("chi", "errors", "bases", "growth", "deep")


def run(quick: bool = False, full: bool = False, out_path: str | None = None, sections=SECTIONS,
        deep_names=("sk", "q3"), deep_ps=(16, 20, 24, 28, 32)) -> dict:
    """Run the measurements; returns a JSON-ready dict."""
    angles = load_angles()
    result = {"benchmark": "bath", "quick": quick, "full": full}

    def record():
        if out_path:
            with open(out_path + ".tmp", "w") as fh:
                json.dump(result, fh, indent=1, default=float)
            os.replace(out_path + ".tmp", out_path)

    def rows(key):
        return result.setdefault(key, [])

    if quick:
        error_table(angles, ("sk", "q3"), range(2, 7), [(8, 16)], record, result_rows=rows("errors"))
        chi_needed(angles, ("sk",), range(2, 7), 10, (4, 8, 16, 32), 1e-6, record, result_rows=rows("chi_needed"))
        basis_table(angles, ("sk",), (4,), [("cholesky", True, 12, 12, 16), ("principal", False, 16, 4, 16)], record,
                    result_rows=rows("bases"))
        return result
    pmax = 12 if full else 9
    if "chi" in sections:
        chi_needed(angles, ("sk", "q3"), range(2, pmax + (3 if full else 1)), 10, (4, 6, 8, 12, 16, 24, 32, 48, 64, 96),
                   1e-6, record, result_rows=rows("chi_needed"))
    if "errors" in sections:
        error_table(angles, MIXTURES, range(2, pmax + 1, 2 if full else 1), [(8, 16), (10, 32), (12, 64)], record,
                    result_rows=rows("errors"))
    if "bases" in sections:
        settings = [(basis, rev, d, tail, chi) for chi in (8, 16, 32)
                    for basis, d, tail in (("cholesky", 12, 12), ("principal", 20, 4)) for rev in (True, False)]
        basis_table(angles, ("sk",), (4, 6, 8) if full else (4, 6), settings, record, result_rows=rows("bases"))
    if full and "deep" in sections:
        deep_table(angles, deep_names, deep_ps, 10, (16, 32, 48, 64), record, stop_after_s=300, result_rows=rows("deep"))
    if full and "growth" in sections:
        growth_table(angles, ("sk", "q3"), (12, 16, 20, 24, 28, 32), 8, 16, record, stop_after_s=600,
                     result_rows=rows("growth"))
    return result
    pmax = 12 if full else 9
    if "chi" in sections:
        chi_needed(angles, ("sk", "q3"), range(2, pmax + (3 if full else 1)), 10,
                                          (4, 6, 8, 12, 16, 24, 32, 48, 64, 96), 1e-6, record, result_rows=result.setdefault("chi_needed", []))
    if "errors" in sections:
        error_table(angles, MIXTURES, range(2, pmax + 1, 2 if full else 1),
                                       [(8, 16), (10, 32), (12, 64)], record, result_rows=result.setdefault("errors", []))
    if "bases" in sections:
        basis_table(angles, ("sk",), (4, 6, 8) if full else (4, 6),
                                      [(basis, rev, d, tail, chi) for chi in (8, 16, 32)
                                       for basis, d, tail in (("cholesky", 12, 12), ("principal", 20, 4))
                                       for rev in (True, False)], record, result_rows=result.setdefault("bases", []))
    if full and "deep" in sections:
        deep_table(angles, deep_names, deep_ps, 10, (16, 32, 48, 64), record, stop_after_s=300,
                   result_rows=result.setdefault("deep", []))
    if full and "growth" in sections:
        growth_table(angles, ("sk", "q3"), (12, 16, 20, 24, 28, 32), 8, 16, record, stop_after_s=600, result_rows=result.setdefault("growth", []))
    return result


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--full", action="store_true", help="p up to 12, basis comparison to p = 8, growth beyond exact reach")
    ap.add_argument("--json", default=None, help="write the result to this file (updated after every measurement)")
    ap.add_argument("--section", action="append", choices=SECTIONS, help="only these parts (repeatable)")
    ap.add_argument("--deep-p", type=int, nargs="+", default=[16, 20, 24, 28, 32], help="depths of the deep section")
    ap.add_argument("--deep-xi", nargs="+", default=["sk", "q3"], choices=MIXTURES, help="mixtures of the deep section")
    ap.add_argument("--tables", nargs="+", metavar="JSON", help="print markdown tables of result files and exit")
    a = ap.parse_args(argv)
    if a.tables:
        for path in a.tables:
            with open(path) as fh:
                print(format_tables(json.load(fh)))
        return 0
    out = run(quick=a.quick, full=a.full, out_path=a.json, sections=a.section or SECTIONS,
              deep_names=tuple(a.deep_xi), deep_ps=tuple(a.deep_p))
    print(json.dumps(out, default=float))
    return 0



def format_tables(result: dict) -> str:
    """Markdown tables of a result (the form pasted into docs/bath.md)."""
    out = []
    if result.get("chi_needed"):
        out += ["| mixture | p | d | chi for 1e-6 | error at that chi | CPU s | ladder tried (chi: error) |",
                "|---|---|---|---|---|---|---|"]
        for r in result["chi_needed"]:
            last = r["tried"][-1]
            ladder = ", ".join(f"{t['chi']}: {t['error']:.1e}" for t in r["tried"])
            out.append(f"| {r['mixture']} | {r['p']} | {r['d']} | {r['chi'] if r['chi'] else '> ' + str(last['chi'])} | "
                       f"{last['error']:.1e} | {last['seconds']:.1f} | {ladder} |")
        out.append("")
    if result.get("errors"):
        truncs = sorted({(r["d"], r["chi"]) for r in result["errors"]})
        out += ["| mixture | p | V_p* (exact) | " + " | ".join(f"error d={d}, chi={c}" for d, c in truncs)
                + " | CPU s (largest) |", "|---|---|---|" + "---|" * len(truncs) + "---|"]
        keys = sorted({(r["mixture"], r["p"]) for r in result["errors"]}, key=lambda k: (MIXTURES.index(k[0]), k[1]))
        for name, p in keys:
            rows = {(r["d"], r["chi"]): r for r in result["errors"] if r["mixture"] == name and r["p"] == p}
            cells = [f"{rows[t]['error']:.1e}" if t in rows else "" for t in truncs]
            last = rows[truncs[-1]] if truncs[-1] in rows else None
            exact = next(iter(rows.values()))["exact"]
            out.append(f"| {name} | {p} | {exact:.8f} | " + " | ".join(cells) + f" | {last['seconds']:.1f} |" if last else "")
        out.append("")
    if result.get("bases"):
        out += ["| mixture | p | basis | chain order | d (top/rest) | chi | error | CPU s |", "|---|---|---|---|---|---|---|---|"]
        for r in result["bases"]:
            out.append(f"| {r['mixture']} | {r['p']} | {r['basis']} | {r['order']} | {r['d']}/{r['tail']} | {r['chi']} | "
                       f"{r['error']:.1e} | {r['seconds']:.1f} |")
        out.append("")
    if result.get("deep"):
        chis = sorted({r["chi"] for row in result["deep"] for r in row["runs"]})
        out += ["| mixture | p | V_p (largest chi) | " + " | ".join(f"chi={c}" for c in chis)
                + " | d+4 at largest chi | CPU s (largest chi) |", "|---|---|---|" + "---|" * len(chis) + "---|---|"]
        for row in result["deep"]:
            by = {r["chi"]: r for r in row["runs"]}
            cells = [f"{by[c]['diff_to_largest']:.1e}" if c in by and c != row["runs"][-1]["chi"] else ("ref" if c in by else "")
                     for c in chis]
            fd = "" if row["fock_diff"] is None else f"{row['fock_diff']:.1e}"
            out.append(f"| {row['mixture']} | {row['p']} | {row['runs'][-1]['value']:.10f} | " + " | ".join(cells)
                       + f" | {fd} | {row['runs'][-1]['seconds']:.0f} |")
        out.append("")
    if result.get("growth"):
        out += ["| mixture | p | V_p (d=12, chi=32) | error estimate | check run (d=8, chi=16) | bond reached | CPU s (both runs) |",
                "|---|---|---|---|---|---|---|"]
        for r in result["growth"]:
            out.append(f"| {r['mixture']} | {r['p']} | {r['value']:.8f} | {r['error_estimate']:.1e} | {r['check_value']:.8f} | "
                       f"{r['largest_bond']} | {r['seconds_both']:.0f} |")
        out.append("")
    return "\n".join(out)


if __name__ == "__main__":
    sys.exit(main())
