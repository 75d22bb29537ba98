"""Benchmark of the exact pass: evaluation and gradient time, throughput, peak memory, ceiling.

What it measures (every measurement in a fresh Python process, so peak memory is
that measurement's own; BLAS pinned to one thread so figures are per core):

* evaluation and gradient of V_p for the SK model at p = 8..14 with the default
  (blocked) kernel: wall and CPU time (medians), path visits per second per core,
  peak memory (numpy allocations by tracemalloc, and the process's peak RSS);
* the same for the plain dense reference (tests/dense_reference.py) at p <= 10 and
  for the row-by-row kernel at p <= 10, interleaved with the blocked runs, giving
  the speed and memory ratios;
* gradient cost / evaluation cost at p = 6, 8, 10, 12;
* SK angle optimization from a warm start (leadline.kernels.optimize) at p = 10
  (and p = 12 with --optimize-p12);
* a probe of the machine: complex GEMM rate (zgemm), memory bandwidth, elementwise
  complex multiply rate, and a fused numba loop if numba is installed, which gives
  the ceiling for the kernel (docs/performance.md, "Ceiling", has the arithmetic).

``run(...)`` returns a JSON-ready dict; benchmarks/run.py prints and stores it.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
SK = "2:0.5"
#: environment of every measurement process: one BLAS/OpenMP thread = per-core figures
SINGLE_THREAD_ENV = {
    "OPENBLAS_NUM_THREADS": "1",
    "OMP_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
    "NUMBA_NUM_THREADS": "1",
}


# =========================================================================== worker side
def _angles(p: int):
    import numpy as np

    rng = np.random.default_rng(1234 + p)
    return rng.uniform(0.1, 0.6, p), rng.uniform(0.1, 0.6, p)


def _rss_bytes() -> int:
    import resource

    return int(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss) * 1024  # Linux: KiB


def _timed(fn, reps: int) -> tuple[list, list, object]:
    walls, cpus, out = [], [], None
    for _ in range(reps):
        t0, c0 = time.perf_counter(), time.process_time()
        out = fn()
        walls.append(time.perf_counter() - t0)
        cpus.append(time.process_time() - c0)
    return walls, cpus, out


def _traced_peak(fn) -> int:
    import tracemalloc

    tracemalloc.start()
    tracemalloc.reset_peak()
    fn()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return int(peak)


def _measure(spec: dict) -> dict:
    """One measurement, in this (fresh) process."""
    import numpy as np

    kind = spec["kind"]
    reps = int(spec.get("reps", 3))
    baseline_rss = _rss_bytes()
    if kind in ("evaluate", "gradient"):
        from leadline.kernels.exact import IMPLEMENTATIONS, evaluate, plan_chunks
        from leadline.kernels.mixture import parse_mixture

        p, impl = int(spec["p"]), spec["impl"]
        mix = parse_mixture(spec.get("xi", SK))
        g, b = _angles(p)
        plan = plan_chunks(p, impl=impl)
        run_pass = IMPLEMENTATIONS[impl]

        def fn():
            return evaluate(mix, g, b, plan=plan, run_pass=run_pass, gradient=(kind == "gradient"))

        if spec.get("warmup", True):
            fn()
        baseline_rss = _rss_bytes()
        walls, cpus, ev = _timed(fn, reps)
        peak = _traced_peak(fn) if spec.get("trace", True) else None
        passes = ev.passes
        return {
            "kind": kind, "impl": impl, "p": p, "plan": plan.to_json(), "value": ev.value,
            "wall_s": walls, "cpu_s": cpus, "passes": passes, "peak_traced_bytes": peak,
            "peak_rss_bytes": _rss_bytes(), "baseline_rss_bytes": baseline_rss,
            "sum_w_residual": ev.residuals["sum_w"],
        }
    if kind == "dense":
        sys.path.insert(0, os.path.dirname(HERE))
        from leadline.kernels.mixture import parse_mixture
        from leadline.tests.dense_reference import dense_value

        p = int(spec["p"])
        mix = parse_mixture(spec.get("xi", SK))
        g, b = _angles(p)
        walls, cpus, V = _timed(lambda: dense_value(mix, g, b), reps)
        peak = _traced_peak(lambda: dense_value(mix, g, b)) if spec.get("trace", True) else None
        return {
            "kind": kind, "impl": "dense", "p": p, "value": float(V.real), "wall_s": walls, "cpu_s": cpus,
            "passes": p, "peak_traced_bytes": peak, "peak_rss_bytes": _rss_bytes(), "baseline_rss_bytes": baseline_rss,
        }
    if kind == "optimize":
        return _measure_optimize(spec)
    if kind == "probe":
        return _probe(spec)
    raise ValueError(f"unknown measurement kind {kind!r}")


def _measure_optimize(spec: dict) -> dict:
    """SK optimization at depth p from the warm start of depth p-1 (chain p = 1..p-1 first)."""
    from leadline.kernels.mixture import parse_mixture
    from leadline.kernels.optimize import optimize_depth

    target = int(spec["p"])
    mix = parse_mixture(spec.get("xi", SK))
    chain = []
    prev, prev_value = None, None
    t_chain = time.perf_counter()
    for p in range(1, target):
        res = optimize_depth(mix, p, previous=prev, previous_value=prev_value)
        chain.append({"p": p, "value": res.value, "evaluations": res.evaluations, "wall_s": res.wall_time})
        prev, prev_value = (res.gamma, res.beta), res.value
        print(f"  optimize chain p={p}: V*={res.value:.6f} ({res.evaluations} evaluations, {res.wall_time:.1f} s)",
              file=sys.stderr, flush=True)
    chain_wall = time.perf_counter() - t_chain
    c0 = time.process_time()
    res = optimize_depth(mix, target, previous=prev, previous_value=prev_value)
    cpu = time.process_time() - c0
    return {
        "kind": "optimize", "p": target, "xi": mix.spec() if hasattr(mix, "spec") else spec.get("xi", SK),
        "value": res.value, "evaluations": res.evaluations, "wall_s": [res.wall_time], "cpu_s": [cpu],
        "converged": bool(res.converged), "gradient_norm": float(res.gradient_norm), "restarts": res.restarts,
        "gamma": [float(x) for x in res.gamma], "beta": [float(x) for x in res.beta],
        "warm_start_chain": chain, "chain_wall_s": chain_wall, "peak_rss_bytes": _rss_bytes(),
    }


def _probe(spec: dict) -> dict:
    """Machine ceiling: zgemm rate, memory bandwidth, elementwise complex rate, fused numba loop."""
    import numpy as np

    rng = np.random.default_rng(0)
    reps = int(spec.get("reps", 5))

    def med(fn):  # CPU time of this single-threaded process: robust to time-slicing by other jobs
        fn()
        return float(np.median(_timed(fn, reps)[1]))

    out = {"kind": "probe"}
    gemm = {}
    for m, k, n in [(1024, 1024, 1024), (256, 256, 256), (512, 512, 256), (256, 1024, 512)]:
        A = rng.standard_normal((m, k)) + 1j * rng.standard_normal((m, k))
        B = rng.standard_normal((k, n)) + 1j * rng.standard_normal((k, n))
        t = med(lambda: A @ B)
        gemm[f"{m}x{k}x{n}"] = m * k * n / t
    out["zgemm_cmac_per_s"] = gemm
    out["zgemm_peak_cmac_per_s"] = max(gemm.values())
    N = 2**25  # 256 MiB per float64 array: far beyond every cache
    a = np.ones(N)
    b = np.empty_like(a)
    c = np.ones(N)
    out["copy_bytes_per_s"] = 2 * 8 * N / med(lambda: np.copyto(b, a))
    out["triad_bytes_per_s"] = 3 * 8 * N / med(lambda: np.add(a, c, out=b))
    del a, b, c
    Nc = 2**22
    x = rng.standard_normal(Nc) + 1j * rng.standard_normal(Nc)
    y = x.copy()
    out["numpy_elementwise_cmul_per_s"] = Nc / med(lambda: np.multiply(x, y, out=y))
    xs, ys = x[: 2**14].copy(), y[: 2**14].copy()  # in L1/L2
    out["numpy_elementwise_cmul_in_cache_per_s"] = 2**14 / med(lambda: np.multiply(xs, ys, out=ys))
    try:
        import numba

        @numba.njit(cache=False)
        def fused(z, u, v, n_rounds):  # z += u * v elementwise over L1-resident vectors (vectorizes)
            for _ in range(n_rounds):
                for i in range(z.size):
                    z[i] += u[i] * v[i]
            return z

        u = xs[:1024].copy()
        v = 1e-3 * ys[:1024] / np.abs(ys[:1024])  # |v| small: z stays bounded
        z = np.zeros(1024, dtype=complex)
        fused(z, u, v, 1)
        rounds = 20000
        t = med(lambda: fused(z, u, v, rounds))
        out["numba_fused_cmac_per_s"] = u.size * rounds / t
        out["numba_version"] = numba.__version__
    except ImportError:
        out["numba_fused_cmac_per_s"] = None
    return out


# =========================================================================== driver side
def _spawn(spec: dict, timeout: float = 3600.0) -> dict:
    """Run one measurement in a fresh interpreter; returns its JSON result."""
    env = dict(os.environ)
    env.update(SINGLE_THREAD_ENV)
    cmd = [sys.executable, os.path.abspath(__file__), "--worker", json.dumps(spec)]
    proc = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=timeout)
    if proc.returncode != 0:
        tail = proc.stderr.strip().splitlines()[-3:]
        return {"kind": spec.get("kind"), "error": " | ".join(tail), **{k: spec[k] for k in ("p", "impl") if k in spec}}
    if proc.stderr.strip():
        sys.stderr.write(proc.stderr)
    return json.loads(proc.stdout.strip().splitlines()[-1])


def _median(xs):
    xs = sorted(x for x in xs if x is not None)
    if not xs:
        return None
    k = len(xs)
    return xs[k // 2] if k % 2 else 0.5 * (xs[k // 2 - 1] + xs[k // 2])


def _machine() -> dict:
    import numpy as np

    cpu = "unknown"
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    try:
        load = os.getloadavg()
    except OSError:
        load = None
    return {
        "cpu": cpu, "logical_cpus": os.cpu_count(), "python": platform.python_version(),
        "numpy": np.__version__, "platform": platform.platform(), "load_average_at_start": load,
        "blas_threads": SINGLE_THREAD_ENV["OPENBLAS_NUM_THREADS"],
    }


def run(
    quick: bool = False,
    p_min: int = 8,
    p_max: int = 14,
    dense_max: int = 10,
    rowwise_max: int = 10,
    reps: int | None = None,
    rounds: int | None = None,
    optimize_p: tuple = (10,),
    ratio_depths: tuple = (6, 8, 10, 12),
    log=print,
) -> dict:
    """Run the kernel benchmark; returns a JSON-ready dict.

    quick : fewer repetitions, p <= 12, no dense p = 10, no optimization runs.
    Baseline and new kernel runs are interleaved round by round (the machine is shared
    and noisy); every figure is the median over all repetitions of all rounds.
    """
    if quick:
        p_max = min(p_max, 12)
        dense_max = min(dense_max, 9)
        optimize_p = ()
    reps = reps or (2 if quick else 3)
    rounds = rounds or (1 if quick else 2)
    started = time.time()
    result = {"benchmark": "kernel", "machine": _machine(), "quick": quick, "reps": reps, "rounds": rounds}

    log("probe: zgemm rate, memory bandwidth, elementwise and fused-loop complex rates")
    result["probe"] = _spawn({"kind": "probe", "reps": 5})

    depths = sorted(set(range(p_min, p_max + 1)) | {p for p in ratio_depths if p <= p_max})
    raw: list[dict] = []
    for rnd in range(rounds):
        for p in depths:
            jobs = []
            if p_min <= p <= dense_max:
                dense_reps = 1 if p >= 10 else reps
                jobs.append({"kind": "dense", "p": p, "reps": dense_reps, "trace": rnd == 0})
            if p_min <= p <= rowwise_max:
                jobs.append({"kind": "evaluate", "impl": "rowwise", "p": p, "reps": reps, "trace": rnd == 0})
            big = p >= 13
            r = 1 if big else reps
            jobs.append({"kind": "evaluate", "impl": "blocked", "p": p, "reps": r, "trace": rnd == 0, "warmup": not big})
            jobs.append({"kind": "gradient", "impl": "blocked", "p": p, "reps": r, "trace": rnd == 0, "warmup": not big})
            if p in ratio_depths and p <= rowwise_max:
                jobs.append({"kind": "gradient", "impl": "rowwise", "p": p, "reps": reps, "trace": False})
            for spec in jobs:
                if big and rnd > 0:
                    continue  # p = 13, 14 measured once (minutes per round)
                t0 = time.perf_counter()
                out = _spawn(spec)
                out["round"] = rnd
                raw.append(out)
                msg = out.get("error") or f"wall median {_median(out.get('wall_s', [])):.3f} s"
                log(f"  round {rnd} p={p:2d} {spec['kind']:9s} {spec.get('impl', 'dense'):8s} {msg}  "
                    f"({time.perf_counter() - t0:.0f} s incl. start-up)")
    result["measurements"] = raw
    result["summary"] = summarize(raw, result["probe"])

    opt = []
    for p in optimize_p:
        log(f"SK optimization at p = {p} from the warm start of depth {p - 1} (chain from p = 1 first)")
        opt.append(_spawn({"kind": "optimize", "p": p}, timeout=4 * 3600))
    result["optimization"] = opt
    result["elapsed_s"] = time.time() - started
    return result


def summarize(raw: list[dict], probe: dict) -> dict:
    """Per depth: medians, ratios against the dense reference and the row kernel, ceiling fraction."""
    by = {}
    for m in raw:
        if "error" in m or "wall_s" not in m:
            continue
        key = (m["p"], m["kind"], m["impl"])
        agg = by.setdefault(key, {"wall": [], "cpu": [], "peak_traced": [], "peak_rss": [], "baseline_rss": [], "value": m.get("value"), "passes": m.get("passes")})
        agg["wall"] += m["wall_s"]
        agg["cpu"] += m["cpu_s"]
        if m.get("peak_traced_bytes") is not None:
            agg["peak_traced"].append(m["peak_traced_bytes"])
        agg["peak_rss"].append(m.get("peak_rss_bytes"))
        agg["baseline_rss"].append(m.get("baseline_rss_bytes"))
    peak_cmac = (probe or {}).get("zgemm_peak_cmac_per_s")
    rows = []
    for p in sorted({k[0] for k in by}):
        ev = by.get((p, "evaluate", "blocked"))
        gr = by.get((p, "gradient", "blocked"))
        de = by.get((p, "dense", "dense"))
        rw = by.get((p, "evaluate", "rowwise"))
        rg = by.get((p, "gradient", "rowwise"))
        paths = 2 ** (2 * p + 1)
        row = {"p": p, "paths_per_pass": paths}

        def put(prefix, agg):
            if agg is None:
                return
            row[f"{prefix}_wall_s"] = _median(agg["wall"])
            row[f"{prefix}_cpu_s"] = _median(agg["cpu"])
            row[f"{prefix}_peak_traced_bytes"] = _median(agg["peak_traced"])
            row[f"{prefix}_peak_rss_bytes"] = _median(agg["peak_rss"])
            row[f"{prefix}_n"] = len(agg["wall"])

        put("eval", ev)
        put("grad", gr)
        put("dense", de)
        put("rowwise", rw)
        put("rowwise_grad", rg)
        if ev:
            row["value"] = ev["value"]
            visits = ev["passes"] * paths
            row["eval_path_visits_per_s_per_core"] = visits / row["eval_cpu_s"]
            if peak_cmac:
                # forward pass: 3 complex multiply-adds per path visit inside zgemm (kernels/exact/_blocked.py)
                row["eval_ceiling_path_visits_per_s"] = peak_cmac / 3.0
                row["eval_fraction_of_ceiling"] = row["eval_path_visits_per_s_per_core"] / (peak_cmac / 3.0)
        if gr:
            row["grad_path_visits_per_s_per_core"] = gr["passes"] * paths / row["grad_cpu_s"]
        if ev and gr:
            row["grad_over_eval_wall"] = row["grad_wall_s"] / row["eval_wall_s"]
            row["grad_over_eval_cpu"] = row["grad_cpu_s"] / row["eval_cpu_s"]
        if ev and de:
            row["dense_over_eval_wall"] = row["dense_wall_s"] / row["eval_wall_s"]
            row["dense_over_eval_cpu"] = row["dense_cpu_s"] / row["eval_cpu_s"]
            if row.get("eval_peak_traced_bytes") and row.get("dense_peak_traced_bytes"):
                row["dense_over_eval_peak_traced"] = row["dense_peak_traced_bytes"] / row["eval_peak_traced_bytes"]
            if de.get("value") is not None and ev.get("value") is not None:
                row["dense_minus_eval_value"] = abs(de["value"] - ev["value"])
        if ev and rw:
            row["rowwise_over_eval_wall"] = row["rowwise_wall_s"] / row["eval_wall_s"]
            row["rowwise_over_eval_cpu"] = row["rowwise_cpu_s"] / row["eval_cpu_s"]
            if row.get("rowwise_peak_traced_bytes") and row.get("eval_peak_traced_bytes"):
                row["rowwise_over_eval_peak_traced"] = row["rowwise_peak_traced_bytes"] / row["eval_peak_traced_bytes"]
        if rw and rg:
            row["rowwise_grad_over_eval_cpu"] = row["rowwise_grad_cpu_s"] / row["rowwise_cpu_s"]
        rows.append(row)
    return {"rows": rows, "targets": _targets(rows)}


def _targets(rows: list[dict]) -> dict:
    at = {r["p"]: r for r in rows}
    t = {}
    r10 = at.get(10, {})
    if "dense_over_eval_wall" in r10:
        t["p10_speedup_vs_dense (>= 100)"] = r10["dense_over_eval_wall"]
    if "dense_over_eval_peak_traced" in r10:
        t["p10_memory_ratio_vs_dense (>= 50)"] = r10["dense_over_eval_peak_traced"]
    r12 = at.get(12, {})
    if "eval_peak_rss_bytes" in r12:
        t["p12_eval_peak_rss_GB (< 1)"] = r12["eval_peak_rss_bytes"] / 1e9
    r14 = at.get(14, {})
    if "eval_wall_s" in r14:
        t["p14_eval_wall_s (< 120)"] = r14["eval_wall_s"]
        t["p14_eval_peak_rss_GB (< 2)"] = (r14.get("eval_peak_rss_bytes") or 0) / 1e9
    for p in (6, 8, 10, 12):
        if "grad_over_eval_cpu" in at.get(p, {}):
            t[f"p{p}_grad_over_eval_cpu (<= 4)"] = at[p]["grad_over_eval_cpu"]
    return t


def format_table(result: dict) -> str:
    """Plain-text table of the summary (what `make bench` prints)."""
    rows = result.get("summary", {}).get("rows", [])
    lines = []
    hdr = (f"{'p':>3} {'eval s':>9} {'grad s':>9} {'grad/eval':>9} {'Mvisits/s/core':>14} {'of ceiling':>10} "
           f"{'peak MB':>8} {'dense s':>8} {'dense/x':>8} {'mem/x':>7} {'rowwise s':>9} {'row/x':>6}")
    lines.append(hdr)
    lines.append("-" * len(hdr))

    def f(x, fmt):
        return format(x, fmt) if isinstance(x, (int, float)) and x is not None else "-"

    for r in rows:
        peak = r.get("eval_peak_traced_bytes")
        lines.append(
            f"{r['p']:>3} {f(r.get('eval_wall_s'), '9.3f')} {f(r.get('grad_wall_s'), '9.3f')} "
            f"{f(r.get('grad_over_eval_cpu'), '9.2f')} "
            f"{f((r.get('eval_path_visits_per_s_per_core') or 0) / 1e6 if r.get('eval_path_visits_per_s_per_core') else None, '14.0f')} "
            f"{f(r.get('eval_fraction_of_ceiling'), '10.2f')} {f(peak / 2**20 if peak else None, '8.1f')} "
            f"{f(r.get('dense_wall_s'), '8.2f')} {f(r.get('dense_over_eval_wall'), '8.0f')} "
            f"{f(r.get('dense_over_eval_peak_traced'), '7.0f')} {f(r.get('rowwise_wall_s'), '9.3f')} "
            f"{f(r.get('rowwise_over_eval_wall'), '6.1f')}"
        )
    probe = result.get("probe") or {}
    if probe.get("zgemm_peak_cmac_per_s"):
        lines.append("")
        lines.append(
            f"machine: zgemm {probe['zgemm_peak_cmac_per_s'] / 1e9:.2f} G complex mult-add/s/core, "
            f"copy {probe['copy_bytes_per_s'] / 1e9:.1f} GB/s, numpy elementwise cmul "
            f"{probe['numpy_elementwise_cmul_per_s'] / 1e9:.2f} G/s (in cache {probe['numpy_elementwise_cmul_in_cache_per_s'] / 1e9:.2f}), "
            + (f"numba fused loop {probe['numba_fused_cmac_per_s'] / 1e9:.2f} G cmac/s" if probe.get("numba_fused_cmac_per_s") else "numba: not installed")
        )
        lines.append(f"ceiling of the forward pass: {probe['zgemm_peak_cmac_per_s'] / 3e6:.0f} M path visits/s/core (3 cmac per visit)")
    for o in result.get("optimization", []):
        if "error" in o:
            lines.append(f"optimization p={o.get('p')}: ERROR {o['error']}")
            continue
        lines.append(
            f"SK optimization p={o['p']} (warm start from p={o['p'] - 1}): V*={o['value']:.6f}, "
            f"{o['evaluations']} evaluations, {o['wall_s'][0]:.1f} s wall; chain p=1..{o['p'] - 1}: {o['chain_wall_s']:.1f} s"
        )
    targets = result.get("summary", {}).get("targets", {})
    if targets:
        lines.append("")
        lines.append("targets: " + "; ".join(f"{k} = {v:.3g}" for k, v in targets.items()))
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--worker", help=argparse.SUPPRESS)
    ap.add_argument("--quick", action="store_true", help="fewer repetitions, p <= 12, no optimization")
    ap.add_argument("--p-max", type=int, default=14)
    ap.add_argument("--optimize-p12", action="store_true", help="also time the SK optimization at p = 12")
    ap.add_argument("--json", help="write the result here")
    args = ap.parse_args(argv)
    if args.worker:
        print(json.dumps(_measure(json.loads(args.worker))))
        return 0
    opt = (10, 12) if args.optimize_p12 else (10,)
    result = run(quick=args.quick, p_max=args.p_max, optimize_p=opt, log=lambda s: print(s, file=sys.stderr, flush=True))
    print(format_table(result))
    if args.json:
        with open(args.json, "w") as fh:
            json.dump(result, fh, indent=1)
    return 0


if __name__ == "__main__":
    sys.exit(main())
