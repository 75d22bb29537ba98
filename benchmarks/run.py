"""`make bench`: run the benchmarks, print a table, write benchmarks/results/latest.json.

Benchmarks are the modules benchmarks/bench_<name>.py that define ``run()``
returning a JSON-ready dict.  The kernel benchmark (bench_kernel.py) spawns a fresh
process per measurement itself; every other module's ``run()`` is called in a fresh
process of its own, so peak-memory figures never mix.

    .venv/bin/python benchmarks/run.py                  # everything
    .venv/bin/python benchmarks/run.py --only kernel    # one (repeatable flag)
    .venv/bin/python benchmarks/run.py --quick          # shorter: fewer repetitions, smaller depths
    .venv/bin/python benchmarks/run.py --optimize-p12   # kernel: also the p = 12 optimization
    .venv/bin/python benchmarks/run.py --list
"""

from __future__ import annotations

import argparse
import glob
import importlib.util
import inspect
import json
import os
import subprocess
import sys
import time

HERE = os.path.dirname(os.path.abspath(__file__))
RESULTS = os.path.join(HERE, "results")


def available() -> list[str]:
    """Names of the benchmark modules present (bench_<name>.py)."""
    names = []
    for path in sorted(glob.glob(os.path.join(HERE, "bench_*.py"))):
        names.append(os.path.basename(path)[len("bench_") : -len(".py")])
    return names


def _load(name: str):
    path = os.path.join(HERE, f"bench_{name}.py")
    spec = importlib.util.spec_from_file_location(f"_leadline_bench_{name}", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _kwargs_for(fn, quick: bool) -> dict:
    """Pass ``quick=True`` to a module's run() only if it accepts it."""
    try:
        params = inspect.signature(fn).parameters
    except (TypeError, ValueError):
        return {}
    return {"quick": True} if quick and "quick" in params else {}


def _module_worker(name: str, quick: bool) -> int:
    """In a fresh process: call bench_<name>.run() and print its JSON on the last line."""
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    module = _load(name)
    t0 = time.perf_counter()
    out = module.run(**_kwargs_for(module.run, quick))
    if isinstance(out, dict):
        out.setdefault("elapsed_s", time.perf_counter() - t0)
    print(json.dumps(out, default=float))
    return 0


def run_module(name: str, quick: bool, timeout: float = 4 * 3600, optimize_p12: bool = False) -> dict:
    """Run one benchmark module in a fresh process; its stderr streams through."""
    if name == "kernel":
        module = _load("kernel")
        opt = (10, 12) if optimize_p12 else (10,)
        return module.run(quick=quick, optimize_p=opt, log=lambda s: print(s, file=sys.stderr, flush=True))
    cmd = [sys.executable, os.path.abspath(__file__), "--module-worker", name] + (["--quick"] if quick else [])
    lines: list[str] = []
    with subprocess.Popen(cmd, stdout=subprocess.PIPE, text=True) as proc:
        for line in proc.stdout:  # progress lines stream through; the last one is the JSON result
            if lines:
                sys.stderr.write("  " + lines[-1])
                sys.stderr.flush()
            lines.append(line)
        try:
            proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            return {"benchmark": name, "error": f"timed out after {timeout:.0f} s"}
    if proc.returncode != 0:
        return {"benchmark": name, "error": f"exit code {proc.returncode}"}
    try:
        return json.loads(lines[-1])
    except (IndexError, json.JSONDecodeError):
        return {"benchmark": name, "error": "no JSON result on the last output line", "output": "".join(lines)[-2000:]}


def _flat_table(name: str, result: dict) -> str:
    """Generic key = value listing for modules without their own formatter."""
    lines = [f"[{name}]"]
    for key, value in result.items():
        if isinstance(value, (dict, list)):
            text = json.dumps(value, default=float)
            if len(text) > 160:
                text = text[:157] + "..."
        else:
            text = f"{value:.6g}" if isinstance(value, float) else str(value)
        lines.append(f"  {key:40s} {text}")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="Run leadline's benchmarks (make bench).")
    ap.add_argument("--only", action="append", metavar="NAME", help="run only this benchmark (repeatable); see --list")
    ap.add_argument("--quick", action="store_true", help="shorter runs (fewer repetitions, smaller sizes)")
    ap.add_argument("--list", action="store_true", help="list the benchmark modules and exit")
    ap.add_argument("--optimize-p12", action="store_true", help="kernel: also time the SK optimization at p = 12 (minutes)")
    ap.add_argument("--output", default=os.path.join(RESULTS, "latest.json"), help="JSON result file")
    ap.add_argument("--module-worker", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.module_worker:
        return _module_worker(args.module_worker, args.quick)
    names = available()
    if args.list:
        print("\n".join(names))
        return 0
    chosen = args.only or names
    unknown = [n for n in chosen if n not in names]
    if unknown:
        print(f"unknown benchmark {unknown[0]!r}; available: {', '.join(names)}", file=sys.stderr)
        return 2
    started = time.strftime("%Y-%m-%dT%H:%M:%S%z")
    results = {}
    for name in chosen:
        print(f"== {name}", file=sys.stderr, flush=True)
        results[name] = run_module(name, args.quick, optimize_p12=args.optimize_p12)
        _write(args.output + ".partial", {"format": "leadline.bench", "version": 1, "started": started, "quick": args.quick, "results": results})
    for name, result in results.items():
        if name == "kernel" and "error" not in result:
            print("[kernel]  (SK model; times are medians; per core = one BLAS thread; ratios measured in this run)")
            print(_load("kernel").format_table(result))
        else:
            print(_flat_table(name, result))
        print()
    doc = {"format": "leadline.bench", "version": 1, "started": started, "quick": args.quick, "results": results}
    _write(args.output, doc)
    if os.path.exists(args.output + ".partial"):
        os.remove(args.output + ".partial")
    print(f"wrote {os.path.relpath(args.output)}")
    return 0


def _write(path: str, doc: dict) -> None:
    os.makedirs(os.path.dirname(os.path.abspath(path)), exist_ok=True)
    tmp = path + ".tmp"
    with open(tmp, "w") as fh:
        json.dump(doc, fh, indent=1, default=float)
    os.replace(tmp, path)


if __name__ == "__main__":
    sys.exit(main())
