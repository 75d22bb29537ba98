"""`make demo`: a small study end to end -- sweep, table, plots -- in demo-output/.

Usage::

    python -m leadline.jobs.demo [--output DIR] [--pmax P] [--no-references]

1. copies the shipped spec ``jobs/demo_study.toml`` (pure q = 2, 3, 4 and a 2+3 mixture,
   p = 1..6, small passes in this process) into DIR (default ``demo-output``),
   with ``pmax`` changed if asked;
2. runs ``leadline sweep DIR/demo_study.toml`` (or ``leadline resume DIR/demo.zarr`` when
   the store exists already, so an interrupted demo continues where it stopped and a finished
   one is not recomputed);
3. records the ground state GS and the algorithmic threshold ALG of every ensemble in the
   store: the values ``leadline reference`` computes at its default settings, shipped in
   ``jobs/demo_references.json`` so the demo does not spend a minute or more recomputing them
   (``--compute-references`` runs ``leadline reference --store`` instead; ``--no-references``
   skips the step).  They give every ensemble the V_p*/GS, V_p*/ALG and "> ALG" columns and the
   GS/ALG lines of the plot;
4. prints the table (Markdown) and writes DIR/table.md, table.csv, table.json, and the figures
   DIR/demo.png (V_p* vs 1/p) and DIR/demo-angles.png (angle schedules).

Each step but the shipped references runs the real command line in a subprocess, exactly as a
user would.
"""

from __future__ import annotations

import argparse
import os
import re
import subprocess
import sys
import time
from pathlib import Path

SPEC_NAME = "demo_study.toml"
STORE_NAME = "demo.zarr"
#: GS/ALG of the demo's mixtures as `leadline reference --xi X --json` computed them (default settings)
REFERENCES_NAME = "demo_references.json"


def shipped_spec_text() -> str:
    path = Path(__file__).with_name(SPEC_NAME)
    if not path.is_file():
        raise SystemExit(f"demo: the shipped spec {path} is missing from this installation")
    return path.read_text(encoding="utf-8")


def _leadline(*args: str, capture: bool = False, env: dict | None = None) -> subprocess.CompletedProcess:
    cmd = [sys.executable, "-m", "leadline", *args]
    print("$ " + (" ".join(f"{k}={v}" for k, v in (env or {}).items()) + " " if env else "") + "leadline " + " ".join(args), flush=True)
    result = subprocess.run(cmd, text=True, capture_output=capture, env={**os.environ, **env} if env else None)
    if result.returncode != 0:
        if capture:
            sys.stderr.write(result.stderr)
        raise SystemExit(f"demo: 'leadline {' '.join(args)}' failed with exit code {result.returncode}")
    return result


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(prog="python -m leadline.jobs.demo", description=__doc__.split("\n")[0])
    parser.add_argument("--output", default="demo-output", help="output folder (default demo-output)")
    parser.add_argument("--pmax", type=int, default=None, help="deepest depth (default: the spec's, 6)")
    parser.add_argument(
        "--no-references", dest="references", action="store_false",
        help="do not record GS and ALG of the ensembles in the store",
    )
    parser.add_argument(
        "--compute-references", action="store_true",
        help="compute GS and ALG with `leadline reference --store` (10-60 s per mixture) instead of "
        "recording the shipped results of that command",
    )
    args = parser.parse_args(argv)

    out = Path(args.output).resolve()
    out.mkdir(parents=True, exist_ok=True)
    text = shipped_spec_text()
    if args.pmax is not None:
        if args.pmax < 1:
            parser.error("--pmax must be >= 1")
        text = re.sub(r"(?m)^pmax = \d+", f"pmax = {args.pmax}", text)
    spec_path = out / SPEC_NAME
    store = out / STORE_NAME
    if store.exists() and spec_path.exists() and spec_path.read_text(encoding="utf-8") != text:
        raise SystemExit(f"demo: {store} was made from another spec; remove {out} (make clean) to start over")
    spec_path.write_text(text, encoding="utf-8")

    start = time.perf_counter()
    if store.exists():
        _leadline("resume", str(store))
    else:
        _leadline("sweep", str(spec_path))
    sweep_seconds = time.perf_counter() - start

    # GS and ALG of every ensemble, recorded in the store itself (table and plot read them there)
    env = None
    if args.references and not _store_has_references(store):
        if args.compute_references:
            _leadline("reference", "--store", str(store))
        else:
            _record_shipped_references(store)

    for fmt, suffix in (("csv", "csv"), ("json", "json"), ("markdown", "md")):
        _leadline("table", str(store), "--format", fmt, "--output", str(out / f"table.{suffix}"), env=env)
    _leadline("plot", str(store), "--output", str(out / "demo.png"), env=env)
    print()
    print((out / "table.md").read_text(encoding="utf-8"))
    print(f"sweep wall time {sweep_seconds:.0f} s; total {time.perf_counter() - start:.0f} s")
    print(f"wrote {out / 'table.md'}, table.csv, table.json, demo.png, demo-angles.png in {out}")


def _record_shipped_references(store: Path) -> None:
    """Write the shipped `leadline reference` results into the store, as `reference --store` would."""
    import json

    from leadline.kernels.mixture import parse_mixture
    from leadline.storage import StudyStore, open_study

    shipped = json.loads(Path(__file__).with_name(REFERENCES_NAME).read_text(encoding="utf-8"))
    by_mixture = {parse_mixture(xi): refs for xi, refs in shipped["references"].items()}
    study = open_study(store)
    with StudyStore.open(store, command="reference") as writer:
        for label in study.ensembles():
            xi = study.ensemble(label).get("xi")
            refs = by_mixture.get(parse_mixture(xi)) if xi else None
            if refs is not None:
                writer.save_references(label, refs)
    print(f"recorded in {store.name}: GS and ALG of {', '.join(sorted(shipped['references']))} "
          f"({shipped['computed_by']}; --compute-references recomputes them)", flush=True)


def _store_has_references(store: Path) -> bool:
    from leadline.storage import open_study

    study = open_study(store)
    dense = [label for label in study.ensembles() if study.ensemble(label).get("xi")]
    return all(study.references(label) is not None for label in dense)


if __name__ == "__main__":
    main()
