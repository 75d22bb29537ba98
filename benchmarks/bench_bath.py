"""Bosonic-bath engine: cost to a tolerance, bond growth with p, against the exact evaluation.

Angles: the optima p = 1..12 of benchmarks/data/bath_angles.json (leadline's exact optimizer;
regenerate with benchmarks/bath_angles.py) for SK (2:0.5), pure q = 3, pure q = 4 and
2:0.5,4:0.5; beyond p = 12 INTERP from the p = 12 optimum (a smooth near-optimal schedule).
Sections:

* readout:  one-state readout against the carried states (the previous engine), same cut-off,
            interleaved, medians of 3 (SK p = 10, 12, 14)
* versus:   evaluate_bath at tolerance 1e-8 against the exact evaluation (leadline.kernels.exact,
            one process), p = 10..16: where the bath is faster at equal or better accuracy
* growth:   largest bond and CPU seconds of one run at a fixed cut-off (default 1e-7),
            p = 8, 16, .., MAX (default 56), the four mixtures (a mixture stops at the first
            depth whose run breaks down at that cut-off)
* check:    the error estimate against the exact evaluation at INTERP angles p = 17..20
            (tolerances 1e-6 and 1e-8), with both engines' CPU seconds (the crossover)
* onset:    the layer at which runs at cut-offs 1e-5, 1e-6, 1e-7 break down (SK p = 60; on request),
            until one reaches the last layer: what the ladder extrapolates its first cut-off from
* target:   evaluate_bath on the targets (SK p = 24 at 1e-6, and SK and q = 3 at p = 40 at 1e-5,
            which take about 15 CPU minutes: run() and `make bench` include them, the command
            line only with --p40; --cases NAME:P:TOL picks others)

"seconds" are CPU seconds of this process (time.process_time) with one BLAS thread, so a busy
machine does not inflate them; peak RSS is the process's maximum resident set.

Usage:  OMP_NUM_THREADS=1 python benchmarks/bench_bath.py [--quick] [--section S ...] [--json FILE]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import sys
import time

import numpy as np

from leadline.kernels.bath import evaluate_bath, run_bath
from leadline.kernels.bath._engine import BathBreakdown
from leadline.kernels.mixture import parse_mixture
from leadline.kernels.optimize import interpolate_angles

HERE = os.path.dirname(os.path.abspath(__file__))
ANGLES = os.path.join(HERE, "data", "bath_angles.json")
MIXTURES = ("sk", "q3", "q4", "mix24")
SECTIONS = ("readout", "versus", "growth", "target", "check", "onset")


def _log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


def load_angles() -> dict:
    with open(ANGLES) as fh:
        return json.load(fh)


def schedule(angles: dict, name: str, p: int):
    """(mixture, gamma, beta): the stored optimum at p <= 12, else INTERP from the p = 12 optimum."""
    mix = parse_mixture(angles[name]["xi"])
    depths = angles[name]["depths"]
    key = str(p) if str(p) in depths else str(max(int(k) for k in depths))
    g, b = np.array(depths[key]["gamma"]), np.array(depths[key]["beta"])
    while g.size < p:
        g, b = interpolate_angles(g, b)
    return mix, g, b


def _rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def readout_table(angles, ps, cutoff, record, rows, reps=3):
    """One state against the carried states, same truncation, interleaved (medians)."""
    for p in ps:
        mix, g, b = schedule(angles, "sk", p)
        times = {"modes": [], "carried": []}
        vals = {}
        for _ in range(reps):
            for readout in ("modes", "carried"):
                c0 = time.process_time()
                r = run_bath(mix, g, b, fock=12, chi=256, cutoff=cutoff, readout=readout)
                times[readout].append(time.process_time() - c0)
                vals[readout] = r
        row = {"p": p, "cutoff": cutoff, "modes_s": float(np.median(times["modes"])),
               "carried_s": float(np.median(times["carried"])), "modes_value": vals["modes"].value,
               "carried_value": vals["carried"].value, "modes_bond": vals["modes"].largest_bond,
               "carried_bond": vals["carried"].largest_bond}
        rows.append(row)
        _log(f"readout p={p}: modes {row['modes_s']:.2f} s, carried {row['carried_s']:.2f} s")
        record()


def versus_table(angles, ps, tol, record, rows):
    from leadline.kernels.exact import evaluate

    for p in ps:
        mix, g, b = schedule(angles, "sk", p)
        c0 = time.process_time()
        exact = evaluate(mix, g, b).value
        t_exact = time.process_time() - c0
        c0 = time.process_time()
        res = evaluate_bath(mix, g, b, tolerance=tol)
        t_bath = time.process_time() - c0
        rows.append({"p": p, "tolerance": tol, "exact_s": t_exact, "bath_s": t_bath, "error": abs(res.value - exact),
                     "estimate": res.error_estimate, "largest_bond": res.run.largest_bond})
        _log(f"versus p={p}: exact {t_exact:.2f} s, bath {t_bath:.2f} s, error {abs(res.value - exact):.1e} "
             f"(estimate {res.error_estimate:.1e})")
        record()


def check_table(angles, cases, tols, record, rows, bond_cap=None):
    """The error estimate against the exact evaluation at INTERP angles beyond p = 12 (and the two
    engines' CPU seconds, for the crossover): one row per (mixture, p, tolerance).  A tolerance the
    engine refuses within its caps (BathLimitError) is a row with the refusal, not a crash."""
    from leadline.kernels.bath import BathLimitError
    from leadline.kernels.exact import evaluate

    caps = {} if bond_cap is None else {"bond_cap": bond_cap}
    for name, p in cases:
        mix, g, b = schedule(angles, name, p)
        c0 = time.process_time()
        exact = evaluate(mix, g, b).value
        t_exact = time.process_time() - c0
        for tol in tols:
            c0 = time.process_time()
            try:
                res = evaluate_bath(mix, g, b, tolerance=tol, **caps)
            except BathLimitError as exc:
                rows.append({"name": name, "p": p, "tolerance": tol, "exact": exact, "exact_s": t_exact,
                             "refused": str(exc), "bath_s": time.process_time() - c0})
                _log(f"check {name} p={p} tol {tol:g}: refused ({exc}); exact {t_exact:.1f} s")
                record()
                continue
            t_bath = time.process_time() - c0
            err = abs(res.value - exact)
            rows.append({"name": name, "p": p, "tolerance": tol, "exact": exact, "exact_s": t_exact,
                         "value": res.value, "error": err, "estimate": res.error_estimate, "bath_s": t_bath,
                         "bounded": bool(err <= res.error_estimate), "largest_bond": res.run.largest_bond,
                         "cutoff": res.run.cutoff, "limiting": res.limiting,
                         "abandoned": sum(1 for r in res.ladder if r.get("value") is None)})
            _log(f"check {name} p={p} tol {tol:g}: error {err:.1e} <= estimate {res.error_estimate:.1e}? "
                 f"{err <= res.error_estimate}; exact {t_exact:.1f} s, bath {t_bath:.1f} s")
            record()


def growth_table(angles, names, ps, cutoff, record, rows, stop_after_s=600.0):
    for name in names:
        for p in ps:
            mix, g, b = schedule(angles, name, p)
            c0 = time.process_time()
            try:
                r = run_bath(mix, g, b, fock=2, fock_max=40, fock_tol=cutoff**2, chi=1024, cutoff=cutoff,
                             check_psd=True)
            except BathBreakdown as exc:  # the cut-off is too loose for this depth: deeper ones too
                rows.append({"name": name, "p": p, "cutoff": cutoff, "breakdown_layer": exc.layer,
                             "seconds": time.process_time() - c0})
                _log(f"growth {name} p={p}: breakdown at layer {exc.layer}")
                record()
                break
            s = time.process_time() - c0
            rows.append({"name": name, "p": p, "cutoff": cutoff, "largest_bond": r.largest_bond, "seconds": s,
                         "max_fock": max(r.fock), "discarded": r.discarded, "value": r.value})
            _log(f"growth {name} p={p}: bond {r.largest_bond}, {s:.1f} s, discarded {r.discarded:.1e}")
            record()
            if s > stop_after_s:
                break


def onset_rows(angles, cases, cutoffs, record, rows):
    """Layer at which one run per cut-off breaks down (the ladder's cheap first runs and what it
    extrapolates from), loosest first, until a run reaches the last layer."""
    for name, p in cases:
        mix, g, b = schedule(angles, name, p)
        for cutoff in cutoffs:
            c0 = time.process_time()
            try:
                r = run_bath(mix, g, b, fock=2, fock_max=40, fock_tol=cutoff**2, chi=1024, cutoff=cutoff,
                             check_psd=True)
            except BathBreakdown as exc:
                rows.append({"name": name, "p": p, "cutoff": cutoff, "breakdown_layer": exc.layer, "bond": exc.bond,
                             "seconds": time.process_time() - c0})
                _log(f"onset {name} p={p} cut-off {cutoff:g}: breakdown at layer {exc.layer}, bond {exc.bond}")
                record()
                continue
            rows.append({"name": name, "p": p, "cutoff": cutoff, "breakdown_layer": None,
                         "largest_bond": r.largest_bond, "seconds": time.process_time() - c0})
            _log(f"onset {name} p={p} cut-off {cutoff:g}: no breakdown, bond {r.largest_bond}")
            record()
            break


def target_rows(angles, cases, record, rows):
    for name, p, tol, *cap in cases:
        mix, g, b = schedule(angles, name, p)
        c0 = time.process_time()
        last = {"k": -1}

        def rung(k, cutoff, t, p_, bond, c0=c0):
            if t == p_ or k != last["k"]:
                last["k"] = k
                _log(f"  {name} p={p_} run {k} cut-off {cutoff:.2g}: layer {t}, bond {bond}, "
                     f"{time.process_time() - c0:.0f} CPU s")

        try:
            res = evaluate_bath(mix, g, b, tolerance=tol, progress=rung, **({"bond_cap": cap[0]} if cap else {}))
            row = {"name": name, "p": p, "tolerance": tol, "bond_cap": res.run.chi, "value": res.value,
                   "estimate": res.error_estimate,
                   "limiting": res.limiting, "largest_bond": res.run.largest_bond, "max_fock": max(res.run.fock),
                   "ladder": res.ladder}
        except ValueError as exc:
            row = {"name": name, "p": p, "tolerance": tol, "refused": str(exc)}
        row.update(seconds=time.process_time() - c0, peak_rss_mb=_rss_mb())
        rows.append(row)
        _log(f"target {name} p={p} tol {tol:g}: {row.get('value', row.get('refused'))} in {row['seconds']:.0f} s")
        record()


def run(quick: bool = False, out_path: str | None = None, sections=SECTIONS[:4], growth_max=56,
        growth_cutoff=1e-7, p40=True, cases_arg=None, growth_names=None,
        check_cases=("sk:17", "q3:17", "q4:17", "mix24:17", "sk:18", "sk:19", "sk:20"),
        check_tols=(1e-6, 1e-8), onset_cases=("sk:60",), check_bond=None) -> dict:
    """Run the measurements; returns a JSON-ready dict."""
    angles = load_angles()
    result = {"benchmark": "bath", "quick": quick}

    def record():
        if out_path:
            with open(out_path + ".tmp", "w") as fh:
                json.dump(result, fh, indent=1, default=float)
            os.replace(out_path + ".tmp", out_path)

    rows = result.setdefault
    if quick:
        readout_table(angles, (8, 10), 1e-8, record, rows("readout", []), reps=1)
        versus_table(angles, (8, 10), 1e-6, record, rows("versus", []))
        return result
    if "readout" in sections:
        readout_table(angles, (10, 12, 14), 1e-8, record, rows("readout", []))
    if "versus" in sections:
        versus_table(angles, (10, 12, 14, 15, 16), 1e-8, record, rows("versus", []))
    if "growth" in sections:
        names = growth_names or MIXTURES
        growth_table(angles, names, range(8, growth_max + 1, 8), growth_cutoff, record, rows("growth", []))
    if "check" in sections:
        cases = [(n, int(p)) for n, p in (c.split(":") for c in check_cases)]
        check_table(angles, cases, check_tols, record, rows("check", []), bond_cap=check_bond)
    if "onset" in sections:
        onset_rows(angles, [(n, int(p)) for n, p in (c.split(":") for c in onset_cases)], (1e-5, 1e-6, 1e-7), record,
                   rows("onset", []))
    if "target" in sections:
        cases = [("sk", 24, 1e-6)] + ([("q3", 40, 1e-5), ("sk", 40, 1e-5, 1024)] if p40 else [])
        if cases_arg:
            cases = [(c[0], int(c[1]), float(c[2]), *map(int, c[3:])) for c in (x.split(":") for x in cases_arg)]
        target_rows(angles, cases, record, rows("target", []))
    return result


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--section", nargs="+", choices=SECTIONS, default=[s for s in SECTIONS if s not in ("check", "onset")])
    ap.add_argument("--growth-max", type=int, default=56)
    ap.add_argument("--growth-cutoff", type=float, default=1e-7)
    ap.add_argument("--growth-names", nargs="+", choices=MIXTURES)
    ap.add_argument("--p40", action="store_true", help="target section: also SK and q = 3 at p = 40 (long)")
    ap.add_argument("--cases", nargs="+",
                    help="target section: these cases instead, as NAME:P:TOLERANCE[:BOND_CAP] (sk:40:1e-5:1024)")
    ap.add_argument("--check", nargs="+", default=None, help="check section: NAME:P cases (default sk:17 .. sk:20)")
    ap.add_argument("--check-tol", nargs="+", type=float, default=[1e-6, 1e-8])
    ap.add_argument("--check-bond", type=int, default=None, help="check section: bond cap (default: the engine's)")
    ap.add_argument("--json", help="write the results here (updated after every row)")
    args = ap.parse_args(argv)
    res = run(quick=args.quick, out_path=args.json, sections=args.section, growth_max=args.growth_max,
              growth_cutoff=args.growth_cutoff, p40=args.p40, cases_arg=args.cases, growth_names=args.growth_names,
              check_tols=tuple(args.check_tol), check_bond=args.check_bond,
              **({"check_cases": tuple(args.check)} if args.check else {}))
    if not args.json:
        print(json.dumps(res, indent=1, default=float))
    return 0


if __name__ == "__main__":
    sys.exit(main())
