"""Store benchmark: what checkpointing costs in a real sweep, and how many files it leaves.

Runs ``leadline sweep`` (in-process executor, one SK ensemble, default optimizer and
checkpoint settings) for p = 1..pmax in a fresh process, then reads the store:

- wall time of the whole command versus the optimizer's own time (the sum of the
  finished depths' ``wall_time_s``: passes plus optimizer arithmetic, without checkpoint
  writes), and their ratio measured in the same run; the CPU time of the sweep process
  (less disturbed than wall time when other jobs share the machine);
- files and bytes in the store when the sweep is done, per finished depth;
- the cost of one checkpoint write of each kind (a batch of pass sums, one chunk
  record), the numbers behind the default checkpoint thresholds (docs/store.md).

    .venv/bin/python benchmarks/bench_store.py              # p = 1..8
    .venv/bin/python benchmarks/bench_store.py --pmax 12    # minutes
    .venv/bin/python benchmarks/bench_store.py --baseline 3dc20bf   # also the same sweep with that commit's code
    .venv/bin/python benchmarks/bench_store.py --baseline 3dc20bf --after cebf7b5   # two commits
    .venv/bin/python benchmarks/run.py --only store --quick # p = 1..6

``--baseline REF`` extracts commit REF of this repository (``git archive``) into a
temporary folder and runs the same sweep with it first, in the same run, so the
before/after ratios come from one run on one machine state.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

SPEC = """
[study]
name = "bench-store"
store = "bench.zarr"
[depths]
pmin = 1
pmax = {pmax}
[compute]
executor = "inprocess"
[[ensemble]]
label = "sk"
xi = "2:0.5"
"""


def tree_size(path: Path) -> tuple[int, int]:
    """(files, bytes) under ``path``."""
    files = size = 0
    for dirpath, _dirs, names in os.walk(path):
        for name in names:
            files += 1
            try:
                size += os.stat(os.path.join(dirpath, name)).st_size
            except OSError:
                pass
    return files, size


def baseline_tree(ref: str, folder: Path) -> Path:
    """An importable ``leadline`` package of commit ``ref`` under ``folder`` (for PYTHONPATH)."""
    repo = Path(__file__).resolve().parents[1]
    src = folder / "src"
    src.mkdir()
    archive = subprocess.run(["git", "-C", str(repo), "archive", ref], capture_output=True, check=True).stdout
    subprocess.run(["tar", "-x", "-C", str(src)], input=archive, check=True)
    pkg = folder / "pkg" / "leadline"
    pkg.mkdir(parents=True)
    for f in (src / "leadline").iterdir():
        (pkg / f.name).symlink_to(f)
    for sub in ("kernels", "storage", "cluster", "jobs", "tests"):
        (pkg / sub).symlink_to(src / sub)
    return folder / "pkg"


def sweep(pmax: int, log=None, pythonpath: Path | None = None, label: str = "this code") -> dict:
    """One sweep p = 1..pmax in a fresh process; wall, optimizer time, files."""
    with tempfile.TemporaryDirectory(prefix="leadline-bench-store-") as tmp:
        folder = Path(tmp)
        spec = folder / "study.toml"
        spec.write_text(SPEC.format(pmax=pmax))
        env = dict(os.environ)
        if pythonpath is not None:
            env["PYTHONPATH"] = str(pythonpath)
        import resource

        before = resource.getrusage(resource.RUSAGE_CHILDREN)
        t0 = time.perf_counter()
        r = subprocess.run([sys.executable, "-m", "leadline", "sweep", str(spec), "--quiet"], capture_output=True,
                           text=True, env=env, cwd=folder)
        wall = time.perf_counter() - t0
        after = resource.getrusage(resource.RUSAGE_CHILDREN)
        cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
        if r.returncode != 0:
            return {"error": r.stderr[-2000:]}
        store = folder / "bench.zarr"
        from leadline.storage import open_study

        study = open_study(store)
        depths = study.depths("sk")
        optimizer = sum(float(d["wall_time_s"]) for d in depths)
        timings = [study.depth("sk", d["p"]).get("timings", {}) for d in depths]
        optimizer_cpu = sum(float(t.get("optimizer_cpu_s", "nan")) for t in timings)
        files, size = tree_size(store)
        out = {
            "code": label,
            "pmax": pmax,
            "wall_s": wall,
            "optimizer_s": optimizer,
            "wall_over_optimizer": wall / optimizer if optimizer > 0 else None,
            "process_cpu_s": cpu,
            "optimizer_cpu_s": optimizer_cpu,
            "cpu_over_optimizer_cpu": cpu / optimizer_cpu if optimizer_cpu > 0 else None,
            "files": files,
            "bytes": size,
            "files_per_depth": files / max(1, len(depths)),
            "values": {d["p"]: d["value"] for d in depths},
        }
        if log:
            log(f"[{label}] sweep p = 1..{pmax}: wall {wall:.1f} s, optimizer {optimizer:.1f} s "
                f"(ratio {out['wall_over_optimizer']:.2f}), process CPU {cpu:.1f} s, {files} files, {size / 1e6:.2f} MB")
        return out


def write_costs(repeats: int = 200) -> dict:
    """Median seconds of one checkpoint write: a batch of pass sums, one chunk record."""
    import statistics

    import numpy as np

    try:
        from leadline.storage.study import write_cost_probe
    except ImportError:
        return {"note": "this version has no write_cost_probe"}
    with tempfile.TemporaryDirectory(prefix="leadline-bench-store-") as tmp:
        return write_cost_probe(Path(tmp), repeats=repeats, median=statistics.median, rng=np.random.default_rng(0))


def run(quick: bool = False, pmax: int | None = None, log=None, baseline: str | None = None,
        after: str | None = None) -> dict:
    log = log or (lambda s: print(s, file=sys.stderr, flush=True))
    pmax = pmax or (6 if quick else 8)
    out = {}
    with tempfile.TemporaryDirectory(prefix="leadline-bench-baseline-") as tmp:
        if baseline:
            (Path(tmp) / "before").mkdir()
            out["baseline"] = sweep(pmax, log, pythonpath=baseline_tree(baseline, Path(tmp) / "before"), label=baseline)
        if after:
            (Path(tmp) / "after").mkdir()
            out["sweep"] = sweep(pmax, log, pythonpath=baseline_tree(after, Path(tmp) / "after"), label=after)
        else:
            out["sweep"] = sweep(pmax, log)
    if baseline and "error" not in out["baseline"] and "error" not in out["sweep"]:
        b, a = out["baseline"], out["sweep"]
        out["after_vs_before"] = {
            "wall_ratio": a["wall_s"] / b["wall_s"],
            "cpu_ratio": a["process_cpu_s"] / b["process_cpu_s"],
            "files_ratio": a["files"] / b["files"],
            "same_values": a["values"] == b["values"],
        }
    out["write_costs"] = write_costs(50 if quick else 200)
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pmax", type=int, default=8)
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--json", help="also write the result to this file")
    ap.add_argument("--baseline", metavar="REF", help="also run the sweep with the code of git commit REF, first")
    ap.add_argument("--after", metavar="REF", help="compare with the code of git commit REF instead of this tree")
    args = ap.parse_args(argv)
    out = run(quick=args.quick, pmax=args.pmax, baseline=args.baseline, after=args.after)
    text = json.dumps(out, indent=1, default=float)
    print(text)
    if args.json:
        Path(args.json).write_text(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
