"""Start-up of the command line: whole-process wall times against a bare numpy import.

Each measurement is a fresh process, interleaved round by round so that load on the
machine hits all of them alike; figures are medians.  Measured:

* ``python -c "import numpy"`` (the baseline: what any numpy tool pays);
* ``leadline --help``, ``leadline --version`` and every subcommand's ``--help``;
* ``leadline evaluate`` at p = 9 (SK, in-process: numpy work of a few hundredths of a second);
* ``python -c "import leadline"`` (the Python API's import).

The targets are ratios to the baseline: ``--help`` within 3x, ``evaluate`` at p <= 9
within 4x (common practice for a command-line tool: answer before the user notices).
The import rule behind them (no dask, distributed, zarr, matplotlib or scipy.optimize at
start-up) is a test: tests/test_startup.py.

    .venv/bin/python benchmarks/run.py --only startup [--quick]
"""

from __future__ import annotations

import os
import statistics
import subprocess
import sys
import time

COMMANDS = ["evaluate", "optimize", "reference", "finite-size", "sweep", "resume", "status", "table", "plot"]
P9_GAMMA = "0.1,0.2,0.3,0.4,0.5,0.6,0.7,0.8,0.9"
P9_BETA = "0.5,0.45,0.4,0.35,0.3,0.25,0.2,0.15,0.1"


def _cases() -> dict[str, list[str]]:
    py = sys.executable
    script = os.path.join(os.path.dirname(py), "leadline")  # the installed console script
    cli = [script] if os.path.exists(script) else [py, "-m", "leadline"]
    cases = {
        "import numpy (baseline)": [py, "-c", "import numpy"],
        "import leadline": [py, "-c", "import leadline"],
        "leadline --help": cli + ["--help"],
        "leadline --version": cli + ["--version"],
    }
    for c in COMMANDS:
        cases[f"leadline {c} --help"] = cli + [c, "--help"]
    cases["leadline evaluate p = 9"] = cli + ["evaluate", "--xi", "2:0.5", "--gamma", P9_GAMMA, "--beta", P9_BETA,
                                              "--executor", "inprocess"]
    return cases


def _time(cmd: list[str]) -> float:
    t0 = time.perf_counter()
    subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=True,
                   env={**os.environ, "OMP_NUM_THREADS": "1"})
    return time.perf_counter() - t0


def run(quick: bool = False) -> dict:
    rounds = 3 if quick else 7
    cases = _cases()
    samples: dict[str, list[float]] = {name: [] for name in cases}
    for name, cmd in cases.items():  # warm the file cache once
        _time(cmd)
    for _ in range(rounds):
        for name, cmd in cases.items():
            samples[name].append(_time(cmd))
    medians = {name: statistics.median(v) for name, v in samples.items()}
    base = medians["import numpy (baseline)"]
    ratios = {name: m / base for name, m in medians.items()}
    helps = [r for n, r in ratios.items() if n.endswith("--help")]
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else None
    return {
        "benchmark": "startup",
        "rounds": rounds,
        "load_average_1min": load,
        "median_wall_s": medians,
        "ratio_to_numpy_import": ratios,
        "worst_help_ratio": max(helps),
        "evaluate_p9_ratio": ratios["leadline evaluate p = 9"],
        "targets": {"help_within": 3.0, "evaluate_p9_within": 4.0},
        "met": {"help": max(helps) <= 3.0, "evaluate_p9": ratios["leadline evaluate p = 9"] <= 4.0},
    }


if __name__ == "__main__":
    import json

    print(json.dumps(run(quick="--quick" in sys.argv), indent=1))
