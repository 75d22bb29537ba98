"""Sparse hypertree recursion: evaluation time, peak memory, gradient cost ratio.

Max-3-XORSAT on 4-regular hypergraphs (q = 3, D = 4), depths p = 8..13.  Each depth is one
evaluation (2^(2p+1) paths); the sweep stops after the first depth that takes longer than
``stop_after_s`` (default 3 minutes) and reports the largest depth that ran.  The gradient /
evaluation cost ratio (goal <= 4) is measured at the smaller depths.

Memory: ``rss_mib`` is the process's peak resident size (getrusage) after the call; depths
run in increasing order, so it is that depth's peak.  ``peak_mib`` is the tracemalloc peak,
which counts numpy's temporaries only: the recursion's large buffers are anonymous memory maps
that tracemalloc does not see.

Two more measurements (not part of ``make bench``'s default run, they take minutes):
``--chunked P``: MaxCut (q = 2, D = 3) at depth P in memory against out of core (the step vectors
in a Zarr scratch folder, kernels/sparse/_chunked.py), and with ``--workers N --worker-gib G``
on a local Dask cluster of N workers; each run in a fresh process, so its peak RSS is its own.
``--published``: the optimizer's MaxCut D = 3 ladder p = 1..10 against arXiv:2503.12789, Table 1.

Usage:  python benchmarks/bench_sparse.py [--max-p 13] [--stop-after 180] [--json out.json]
        python benchmarks/bench_sparse.py --chunked 14 [--workers 2 --worker-gib 6] [--scratch DIR] [--bands]
        python benchmarks/bench_sparse.py --published
        python benchmarks/bench_sparse.py --plan p14.json [p15.json] [--target-p 17]
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


#: MaxCut on 3-regular graphs of large girth, optimal cut fraction, truncated to 4 digits
#: (arXiv:2503.12789, Table 1)
PUBLISHED_MAXCUT_D3 = [0.6924, 0.7559, 0.7923, 0.8168, 0.8363, 0.8498, 0.8597, 0.8673, 0.8734, 0.8784]

_CHILD = r"""
import json, resource, sys, time
import numpy as np
p, where, scratch, workers, gib, bits = sys.argv[1], sys.argv[2], sys.argv[3], int(sys.argv[4]), float(sys.argv[5]), int(sys.argv[6])
bands = len(sys.argv) > 7 and sys.argv[7] == "bands"

# --bands: every row task, column task and chunk-file read/write timed where it runs (this
# process, or each Dask worker: the wrappers are pickled by value and count into a dict of the
# leadline.cluster.sparse_vectors module of the process that runs them)
import threading

def _add(key, seconds, cpu, points, nbytes):
    import leadline.cluster.sparse_vectors as sv
    lock = sv.__dict__.setdefault("_bench_lock", threading.Lock())
    with lock:
        s = sv.__dict__.setdefault("_bench_stats", {}).setdefault(key, [0, 0.0, 0.0, 0, 0])
        s[0] += 1; s[1] += seconds; s[2] += cpu; s[3] += points; s[4] += nbytes

def _install():
    import leadline.cluster.sparse_vectors as sv
    if getattr(sv.VectorFiles, "_bench", False):
        return 0
    rc, wc = sv.VectorFiles.read_chunk, sv.VectorFiles.write_chunk
    def read_chunk(self, path, buf):
        t, c = time.perf_counter(), time.thread_time()
        out = rc(self, path, buf)
        _add("chunk read", time.perf_counter() - t, time.thread_time() - c, buf.size, buf.nbytes)
        return out
    def write_chunk(self, path, buf):
        t, c = time.perf_counter(), time.thread_time()
        wc(self, path, buf)
        _add("chunk write", time.perf_counter() - t, time.thread_time() - c, buf.size, buf.nbytes)
    sv.VectorFiles.read_chunk, sv.VectorFiles.write_chunk, sv.VectorFiles._bench = read_chunk, write_chunk, True
    return 1

class _Timed:
    def __init__(self, func, key):
        self.func, self.key = func, key
    def __call__(self, *args):
        t, c = time.perf_counter(), time.thread_time()
        out = self.func(*args)
        band = out[0] if isinstance(out, tuple) else out
        points = band.size if isinstance(band, np.ndarray) else args[0].size
        # keyed by size too: at p = 14..17 phat bands have 2^20 points, step and root bands 2^22
        _add(f"{self.key} 2^{int(points).bit_length() - 1}", time.perf_counter() - t, time.thread_time() - c, points,
             16 * points)
        return out

transforms = []

def _instrument(store):
    orig_t, orig_r = store.transform, store.reduce
    def transform(out, row_func, srcs, out_n, nb, col_func=None):
        name = getattr(row_func, "func", row_func).__name__
        t = time.perf_counter()
        res = orig_t(out, _Timed(row_func, "row " + name), srcs, out_n, nb,
                     None if col_func is None else _Timed(col_func, "column"))
        transforms.append({"row": name, "n": out_n, "bands": nb, "columns": col_func is not None,
                           "inputs": [s for s in ([srcs] if isinstance(srcs, str) else srcs)],
                           "seconds": round(time.perf_counter() - t, 3)})
        return res
    def reduce(func, src, nb):
        t = time.perf_counter()
        res = orig_r(_Timed(func, "reduce " + getattr(func, "func", func).__name__), src, nb)
        transforms.append({"row": "reduce", "n": None, "bands": nb, "columns": False, "inputs": [src],
                           "seconds": round(time.perf_counter() - t, 3)})
        return res
    store.transform, store.reduce = transform, reduce
    return store

p = int(p)
t = (np.arange(p) + 0.5) / p
g, b = (0.5 * t + 0.1) / np.sqrt(3), 0.5 * (1 - t) + 0.05
steps = []
def progress(m, p, s):
    steps.append([m, round(s, 3)])
t0 = time.perf_counter()
if where == "memory":
    from leadline.kernels.sparse import evaluate_sparse
    ev = evaluate_sparse(2, 3, g, b)
else:
    from leadline.cluster.sparse_vectors import LocalBandStore, ZarrBandStore
    from leadline.kernels.sparse import evaluate_chunked
    from leadline.storage.sparse_scratch import SparseScratch
    sc = SparseScratch.open(scratch, {"bench": p})
    if where == "disk":
        store = LocalBandStore(sc, target_bits=bits)
        if bands:
            _install()
            _instrument(store)
        ev = evaluate_chunked(2, 3, g, b, store, target_bits=bits, progress=progress)
        store.close()
        if bands:
            import leadline.cluster.sparse_vectors as sv
            stats = [dict(sv.__dict__.get("_bench_stats", {}))]
    else:
        from dask.distributed import Client, LocalCluster
        with LocalCluster(n_workers=workers, threads_per_worker=1, memory_limit=f"{gib}GiB", processes=True,
                          dashboard_address=None, host="127.0.0.1") as cl, Client(cl) as client:
            def cpu():
                ru = resource.getrusage(resource.RUSAGE_SELF)
                return ru.ru_utime + ru.ru_stime
            if bands:
                client.run(_install)
            c0 = sum(client.run(cpu).values())
            store = ZarrBandStore(sc, target_bits=bits, client=client)
            if bands:
                _instrument(store)
            ev = evaluate_chunked(2, 3, g, b, store, target_bits=bits, progress=progress)
            workers_cpu = sum(client.run(cpu).values()) - c0
            if bands:
                stats = list(client.run(lambda: dict(__import__("leadline.cluster.sparse_vectors").cluster.sparse_vectors.__dict__.get("_bench_stats", {}))).values())
            workers_rss = max(client.run(lambda: resource.getrusage(resource.RUSAGE_SELF).ru_maxrss).values())
    sc.remove()
wall = time.perf_counter() - t0
ru = resource.getrusage(resource.RUSAGE_SELF)
out = {"where": where, "p": p, "value": ev.value, "seconds": round(wall, 2), "cpu_s": round(ru.ru_utime + ru.ru_stime, 2),
       "sys_s": round(ru.ru_stime, 2), "load": [round(x, 2) for x in __import__("os").getloadavg()],
       "rss_mib": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1), "steps": steps}
if where == "workers":
    out["worker_rss_mib"] = round(workers_rss / 1024, 1)
    out["workers_cpu_s"] = round(workers_cpu, 2)
if bands and where != "memory":
    # summed over the processes that ran tasks: calls, wall s, thread CPU s, points, bytes
    total = {}
    for one in stats:
        for key, (n, sec, cpu_, pts, nb) in one.items():
            acc = total.setdefault(key, [0, 0.0, 0.0, 0, 0])
            for k, v in enumerate((n, sec, cpu_, pts, nb)):
                acc[k] += v
    out["tasks"] = {k: {"calls": v[0], "wall_s": round(v[1], 3), "cpu_s": round(v[2], 3), "points": v[3], "bytes": v[4],
                        "points_per_call": v[3] // max(1, v[0])} for k, v in sorted(total.items())}
    out["transforms"] = transforms
print(json.dumps(out))
"""


def run_chunked(p: int, scratch: str, workers: int = 0, worker_gib: float = 6.0, bits: int | None = None,
                only: str | None = None, repeat: int = 1, bands: bool = False) -> dict:
    """In memory, then out of core (and on a local cluster if ``workers``), fresh processes, interleaved."""
    import os
    import subprocess

    from leadline.kernels.sparse import CHUNK_POINTS_BITS

    bits = bits or CHUNK_POINTS_BITS
    env = {**os.environ, "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
    runs = []
    for where in (["memory", "disk"] + (["workers"] if workers else [])) * repeat:
        if only and where != only:
            continue
        r = subprocess.run([sys.executable, "-c", _CHILD, str(p), where, scratch, str(workers), str(worker_gib), str(bits)]
                           + (["bands"] if bands else []),
                           capture_output=True, text=True, env=env)
        if r.returncode != 0:
            runs.append({"where": where, "p": p, "error": r.stderr.strip().splitlines()[-1:]})
        else:
            runs.append(json.loads(r.stdout.strip().splitlines()[-1]))
        print(json.dumps(runs[-1]), flush=True)
    medians = {}
    for where in ("memory", "disk", "workers"):
        done = [r for r in runs if r["where"] == where and "seconds" in r]
        if done:
            medians[where] = {k: float(np.median([r[k] for r in done])) for k in ("seconds", "cpu_s", "rss_mib")}
    if "memory" in medians:
        for where, m in medians.items():
            m["wall_ratio_to_memory"] = round(m["seconds"] / medians["memory"]["seconds"], 2)
            m["cpu_ratio_to_memory"] = round(m["cpu_s"] / medians["memory"]["cpu_s"], 2)
    return {"benchmark": "sparse-chunked", "p": p, "band_bits": bits, "runs": runs, "medians": medians}


def plan(files: list[str], target_p: int = 17) -> dict:
    """The p = ``target_p`` cluster plan of docs/clusters.md from ``--chunked P --bands`` results
    (their JSON files): per-band CPU rates measured where the tasks ran, totals of each run scaled
    by 4 per depth (every vector of the recursion has 4x the points one depth up; the band sizes
    stay), and the sizes the recursion's layout gives at ``target_p`` (computed, exact)."""
    from leadline.cluster.sparse_vectors import largest_block
    from leadline.kernels.sparse import CHUNK_POINTS_BITS as T, band_bits

    gib, rows = 2.0**30, []
    runs = [r for f in files for r in json.load(open(f))["runs"] if "tasks" in r]
    P = target_p
    k = band_bits(2 * P - 3, P, T - 2)
    sizes = {"Z of the last step (GiB)": 16 * 2.0 ** (2 * P - 1) / gib, "phat of the last step (GiB)": 16 * 2.0 ** (2 * P - 3) / gib,
             "bands of the last step's vectors": 2**k, "points per band: phat / Z / root": f"2^{2 * P - 3 - k} / 2^{2 * P - 1 - k} / "
             f"2^{2 * P - 1 - band_bits(2 * P - 1, P + 1, T)}", "largest block (points)": f"2^{largest_block(P, T).bit_length() - 1}",
             # every transform with a column pass moves its output vector once between the halves
             "rechunk exchange per value (GiB)": (sum(16 * (2.0 ** (2 * m - 3) + 2.0 ** (2 * m - 1)) for m in range(3, P + 1))
                                                  + 16 * 2.0 ** (2 * P - 1)) / gib}
    for r in runs:
        scale = 4.0 ** (P - r["p"])
        line = {"where": r["where"], "p": r["p"], "load": r["load"], "seconds": r["seconds"],
                "cpu_s": r["cpu_s"] + r.get("workers_cpu_s", 0.0), "rss_mib": r.get("worker_rss_mib", r["rss_mib"])}
        for key, t in r["tasks"].items():
            line[key] = {"calls": t["calls"], "cpu_s_per_call": round(t["cpu_s"] / t["calls"], 4),
                         "ns_cpu_per_point": round(1e9 * t["cpu_s"] / t["points"], 2),
                         "MB_per_wall_s": round(t["bytes"] / max(t["wall_s"], 1e-9) / 1e6, 1)}
        io = {k2: r["tasks"][k2]["bytes"] / gib for k2 in ("chunk read", "chunk write") if k2 in r["tasks"]}
        line["folder_read_gib"], line["folder_write_gib"] = round(io.get("chunk read", 0), 2), round(io.get("chunk write", 0), 2)
        line[f"scaled to p = {P}"] = {"cpu_hours": round(line["cpu_s"] * scale / 3600, 2),
                                      "folder_read_gib": round(io.get("chunk read", 0) * scale),
                                      "folder_write_gib": round(io.get("chunk write", 0) * scale)}
        rows.append(line)
        print(json.dumps(line), flush=True)
    return {"benchmark": "sparse-plan", "target_p": P, "sizes": sizes, "runs": rows}


def run_published(pmax: int = 10, write: str | None = None) -> dict:
    """The optimizer's MaxCut D = 3 ladder p = 1..pmax (the restarts per depth of `optimize --sparse-q 2 --degree 3`, jobs.ladders.sparse_ladder;
    gradient-tol 1e-9) against the published table; ``write``: also the optimal angles as a CSV (the
    test data of tests/test_sparse.py, which checks the table's values at them)."""
    from leadline.jobs.ladders import sparse_default_restarts
    from leadline.kernels.sparse import optimize_sparse

    t0 = time.perf_counter()
    rows, previous, previous_value = [], None, None
    for p in range(1, pmax + 1):  # the ladder of sparse_ladder, one depth at a time to time each and keep the angles
        ts = time.perf_counter()
        res = optimize_sparse(2, 3, p, previous=previous, previous_value=previous_value, restarts=sparse_default_restarts(p), seed=0,
                              gtol=1e-9, maxiter=500)
        previous, previous_value = (res.gamma, res.beta), res.value
        t = PUBLISHED_MAXCUT_D3[p - 1]
        rows.append({"p": p, "value": res.value, "published": t, "ok": t <= res.value < t + 1e-4,
                     "evaluations": res.evaluations, "gradient_norm": res.gradient_norm,
                     "seconds": round(time.perf_counter() - ts, 2), "gamma": list(res.gamma), "beta": list(res.beta)})
        r = rows[-1]
        print(f"p={p:2d}  {r['value']:.6f}  table {t:.4f}  {'ok' if r['ok'] else 'MISMATCH'}  "
              f"{r['evaluations']} evaluations, gradient norm {r['gradient_norm']:.1e}, {r['seconds']} s", flush=True)
    if write:
        with open(write, "w") as fh:
            fh.write("# Optimal QAOA angles of MaxCut on 3-regular graphs of large girth (q = 2, D = 3), computed by this tool:\n"
                     "#   python benchmarks/bench_sparse.py --published --write-angles FILE (optimize_sparse ladder, INTERP\n"
                     "#   warm starts, default restarts, seed 0, gradient-tol 1e-9); values at full precision, angles as hex floats.\n"
                     "# The check is against arXiv:2503.12789, Table 1 (tests/test_sparse.py).\n"
                     "p,value,gradient_norm,gamma,beta\n")
            for r in rows:
                fh.write(f"{r['p']},{r['value']!r},{r['gradient_norm']:.2e},{' '.join(float(x).hex() for x in r['gamma'])},"
                         f"{' '.join(float(x).hex() for x in r['beta'])}\n")
    return {"benchmark": "sparse-published", "rows": rows, "all_ok": all(r["ok"] for r in rows),
            "seconds": round(time.perf_counter() - t0, 1)}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--max-p", type=int, default=13)
    ap.add_argument("--min-p", type=int, default=8)
    ap.add_argument("--stop-after", type=float, default=180.0, help="seconds; stop after the first slower depth")
    ap.add_argument("--json", default=None, help="also write the result to this file")
    ap.add_argument("--chunked", type=int, default=None, help="depth of the in-memory vs out-of-core comparison")
    ap.add_argument("--workers", type=int, default=0, help="with --chunked: also on a local cluster of this many workers")
    ap.add_argument("--worker-gib", type=float, default=6.0, help="memory limit of each worker (GiB)")
    ap.add_argument("--scratch", default="bench-sparse-scratch", help="scratch folder of the chunked runs")
    ap.add_argument("--band-bits", type=int, default=None, help="bands of about 2^BITS points")
    ap.add_argument("--repeat", type=int, default=1, help="with --chunked: run the paths this many times, interleaved")
    ap.add_argument("--only", choices=["memory", "disk", "workers"], default=None, help="with --chunked: run only this path")
    ap.add_argument("--bands", action="store_true", help="with --chunked: time every row task, column task and "
                    "chunk-file read/write where it runs (the per-band rates of docs/clusters.md)")
    ap.add_argument("--published", action="store_true", help="the MaxCut D = 3 ladder p = 1..10 against the table")
    ap.add_argument("--plan", nargs="+", default=None, metavar="JSON",
                    help="the cluster plan from --chunked P --bands results (docs/clusters.md)")
    ap.add_argument("--target-p", type=int, default=17, help="with --plan: the depth planned for")
    ap.add_argument("--write-angles", default=None, help="with --published: write the optimal angles to this CSV")
    a = ap.parse_args(argv)
    if a.plan:
        out = plan(a.plan, a.target_p)
    elif a.chunked:
        out = run_chunked(a.chunked, a.scratch, a.workers, a.worker_gib, a.band_bits, a.only, a.repeat, a.bands)
    elif a.published:
        out = run_published(write=a.write_angles)
    else:
        out = run(p_min=a.min_p, p_max=a.max_p, stop_after_s=a.stop_after)
    text = json.dumps(out, indent=2)
    print(text)
    if a.json:
        with open(a.json, "w") as fh:
            fh.write(text + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
