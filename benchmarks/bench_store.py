"""Store benchmark: what checkpointing costs in a real sweep, and how many files it leaves.

Runs ``leadline sweep`` (in-process executor, one SK ensemble, default optimizer and
checkpoint settings) for p = 1..pmax in a fresh process, then reads the store:

- wall time of the whole command versus the optimizer's own time (the sum of the
  finished depths' ``wall_time_s``: passes plus optimizer arithmetic), and their ratio
  measured in the same run;
- files and bytes in the store when the sweep is done, per finished depth;
- the cost of one checkpoint write of each kind (a batch of pass sums, one chunk
  record), the numbers behind the default checkpoint thresholds (docs/store.md).

    .venv/bin/python benchmarks/bench_store.py              # p = 1..8
    .venv/bin/python benchmarks/bench_store.py --pmax 12    # minutes
    .venv/bin/python benchmarks/run.py --only store --quick # p = 1..6
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


def sweep(pmax: int, log=None) -> dict:
    """One sweep p = 1..pmax in a fresh process; wall, optimizer time, files."""
    with tempfile.TemporaryDirectory(prefix="leadline-bench-store-") as tmp:
        folder = Path(tmp)
        spec = folder / "study.toml"
        spec.write_text(SPEC.format(pmax=pmax))
        t0 = time.perf_counter()
        r = subprocess.run([sys.executable, "-m", "leadline", "sweep", str(spec), "--quiet"], capture_output=True,
                           text=True)
        wall = time.perf_counter() - t0
        if r.returncode != 0:
            return {"error": r.stderr[-2000:]}
        store = folder / "bench.zarr"
        from leadline.storage import open_study

        depths = open_study(store).depths("sk")
        optimizer = sum(float(d["wall_time_s"]) for d in depths)
        files, size = tree_size(store)
        out = {
            "pmax": pmax,
            "wall_s": wall,
            "optimizer_s": optimizer,
            "wall_over_optimizer": wall / optimizer if optimizer > 0 else None,
            "files": files,
            "bytes": size,
            "files_per_depth": files / max(1, len(depths)),
            "values": {d["p"]: d["value"] for d in depths},
        }
        if log:
            log(f"sweep p = 1..{pmax}: wall {wall:.1f} s, optimizer {optimizer:.1f} s "
                f"(ratio {out['wall_over_optimizer']:.2f}), {files} files, {size / 1e6:.2f} MB")
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


def run(quick: bool = False, pmax: int | None = None, log=None) -> dict:
    log = log or (lambda s: print(s, file=sys.stderr, flush=True))
    pmax = pmax or (6 if quick else 8)
    return {"sweep": sweep(pmax, log), "write_costs": write_costs(50 if quick else 200)}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pmax", type=int, default=8)
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--json", help="also write the result to this file")
    args = ap.parse_args(argv)
    out = run(quick=args.quick, pmax=args.pmax)
    text = json.dumps(out, indent=1, default=float)
    print(text)
    if args.json:
        Path(args.json).write_text(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
