"""Start-up rule of the command line: heavy libraries load only inside the commands that use them.

Checked in fresh subprocesses through ``sys.modules`` (a module once imported
stays there), so the check does not depend on what this test process has
already imported.  Timings are not asserted here; they are in
benchmarks/bench_startup.py.
"""

from __future__ import annotations

import json
import subprocess
import sys

HEAVY = ("dask", "distributed", "zarr", "matplotlib", "scipy.optimize", "pandas")

COMMANDS = ["evaluate", "optimize", "reference", "finite-size", "sweep", "resume", "status", "table", "plot"]

_PROBE = """
import json, sys
{body}
print(json.dumps(sorted(m for m in {heavy!r} if m in sys.modules)))
"""


def _loaded(body: str) -> list[str]:
    code = _PROBE.format(body=body, heavy=HEAVY)
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout.strip().splitlines()[-1])


def _help_body(*argvs: list[str]) -> str:
    """Run the CLI in-process once per argv (sys.modules only grows: one probe covers them all)."""
    return (
        "import contextlib, io\n"
        "from leadline.jobs.cli import main\n"
        f"for argv in {list(argvs)!r}:\n"
        "    with contextlib.redirect_stdout(io.StringIO()):\n"
        "        try:\n"
        "            main(argv)\n"
        "        except SystemExit as exc:\n"
        "            assert exc.code in (0, None), (argv, exc.code)\n"
    )


def test_importing_the_cli_loads_no_heavy_library():
    assert _loaded("import leadline.jobs.cli") == []


def test_import_leadline_is_light():
    # the Python API's names are imported on first use
    assert _loaded("import leadline; leadline.__all__") == []


def test_help_and_version_load_no_heavy_library():
    argvs = [["--help"], ["--version"]] + [[c, "--help"] for c in COMMANDS]
    assert _loaded(_help_body(*argvs)) == []


def test_evaluate_loads_no_heavy_library():
    # an in-process evaluation needs numpy only: no Dask, no store, no optimizer
    body = _help_body(["evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", "0.392699", "--executor", "inprocess"])
    assert _loaded(body) == []


def test_the_probe_sees_a_heavy_import():
    # guards the guard: a command that needs zarr does load it
    assert _loaded("import leadline.storage.study") == ["zarr"]
