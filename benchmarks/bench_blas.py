"""BLAS threads in the process that runs a command: capped (the default) against left alone.

numpy's OpenBLAS starts one thread per core in every process.  The command line caps it at
``LEADLINE_BLAS_THREADS`` (default 1) through threadpoolctl; ``LEADLINE_BLAS_THREADS=auto``
leaves it as it starts.  Two commands, each run as a user would (a fresh ``leadline`` process):

  bath    ``leadline evaluate --method bath`` at p = 10 (p = 8 with --quick)
  exact   ``leadline evaluate`` at p = 12 with ``--gradient``

under two conditions: "as found" (the machine with whatever else runs on it; its load average is
recorded) and "loaded" (the same plus one busy-looping process per core started here).  Runs are
interleaved (capped, auto, capped, auto, ...) so both settings see the same machine; medians of
wall time, with the peak resident memory of the command.

    .venv/bin/python benchmarks/bench_blas.py [--quick] [--repeats N]
"""

from __future__ import annotations

import json
import multiprocessing
import os
import statistics
import subprocess
import sys
import time

THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


def _angles(p: int) -> tuple[str, str]:
    # a linear ramp (the usual shape of optimal schedules); the timing does not depend on the values
    gamma = [0.2 + 0.4 * (t + 0.5) / p for t in range(p)]
    beta = [0.6 * (1 - (t + 0.5) / p) for t in range(p)]
    return ",".join(f"{x:.4f}" for x in gamma), ",".join(f"{x:.4f}" for x in beta)


def _commands(quick: bool) -> dict[str, list[str]]:
    leadline = [sys.executable, "-m", "leadline"]
    g10, b10 = _angles(8 if quick else 10)
    g12, b12 = _angles(10 if quick else 12)
    return {
        f"bath p={8 if quick else 10}": leadline + ["evaluate", "--xi", "2:0.5", "--method", "bath", "--gamma", g10, "--beta", b10],
        f"exact p={10 if quick else 12} --gradient": leadline + ["evaluate", "--xi", "2:0.5", "--gradient", "--gamma", g12, "--beta", b12],
    }


def _run(cmd: list[str], threads: str) -> dict:
    env = {k: v for k, v in os.environ.items() if k not in THREAD_VARS}
    env["LEADLINE_BLAS_THREADS"] = threads
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed: {proc.stderr.read().decode()}")
    return {"wall_s": wall, "cpu_s": usage.ru_utime + usage.ru_stime, "peak_rss_mib": usage.ru_maxrss / 1024}


def _spin(stop) -> None:
    x = 0
    while not stop.is_set():
        x += 1


def _measure(commands: dict, repeats: int, bath_repeats: int, condition: str, log) -> dict:
    out = {"condition": condition, "loadavg_before": os.getloadavg()[0], "commands": {}}
    for name, cmd in commands.items():
        runs = {"1": [], "auto": []}
        # the bath run left alone can take minutes on a busy machine: once, unless asked otherwise
        for _ in range(repeats if not name.startswith("bath") else bath_repeats):
            for threads in ("1", "auto"):
                runs[threads].append(_run(cmd, threads))
                log(f"{condition:>8}  {name:<24} threads={threads:<4} {runs[threads][-1]['wall_s']:7.2f} s")
        med = {t: statistics.median(r["wall_s"] for r in rs) for t, rs in runs.items()}
        out["commands"][name] = {
            "median_wall_s": med,
            "auto_over_capped": med["auto"] / med["1"],
            "peak_rss_mib": {t: max(r["peak_rss_mib"] for r in rs) for t, rs in runs.items()},
            "runs": runs,
        }
    out["loadavg_after"] = os.getloadavg()[0]
    return out


def run(quick: bool = False, repeats: int | None = None, log=lambda s: print(s, file=sys.stderr, flush=True)) -> dict:
    bath_repeats = repeats or 1
    repeats = repeats or (1 if quick else 3)
    commands = _commands(quick)
    result = {"cores": os.cpu_count(), "repeats": repeats, "bath_repeats": bath_repeats,
              "as_found": _measure(commands, repeats, bath_repeats, "as found", log)}
    stop = multiprocessing.Event()
    spinners = [multiprocessing.Process(target=_spin, args=(stop,), daemon=True) for _ in range(os.cpu_count() or 1)]
    for s in spinners:
        s.start()
    try:
        result["loaded"] = _measure(commands, repeats, bath_repeats, "loaded", log)
    finally:
        stop.set()
        for s in spinners:
            s.join()
    return result


if __name__ == "__main__":
    import argparse

    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--repeats", type=int, default=None)
    args = parser.parse_args()
    print(json.dumps(run(quick=args.quick, repeats=args.repeats), indent=1))
