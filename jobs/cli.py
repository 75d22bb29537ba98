"""The `leadline` command line: parse, validate, call jobs, print.

Each command lives in its own module in ``jobs/commands/`` with a ``register(app)``
function; the list below is the only place that knows them all.

Start-up rule: importing this module (and so ``leadline --help``) must not load
dask, distributed, zarr, matplotlib or scipy.optimize; the command modules
import them inside the commands that use them (tests/test_startup.py guards it,
benchmarks/bench_startup.py times it).
"""

from __future__ import annotations

import importlib
import sys
from typing import Optional

import typer

from .errors import InputError, Stopped
from .renames import renamed_option

app = typer.Typer(
    name="leadline",
    help=(
        "Exact infinite-size QAOA energies V_p(gamma, beta) for mixed-spin glasses: "
        "evaluate, optimize angles per depth, run resumable depth sweeps, "
        "and extrapolate the optimum in 1/p.\n\n"
        "Example: leadline evaluate --xi 2:0.5 --gamma 0.5 --beta 0.3927"
    ),
    no_args_is_help=True,
    add_completion=True,  # --install-completion / --show-completion (bash, zsh, fish, PowerShell)
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)

COMMAND_MODULES = [
    "leadline.jobs.commands.evaluate",
    "leadline.jobs.commands.reference",
    "leadline.jobs.commands.finite_size",
    "leadline.jobs.commands.optimize",
    "leadline.jobs.commands.table",
    "leadline.jobs.commands.plot",
    "leadline.jobs.commands.sweep",
    "leadline.jobs.commands.transfer",
]


def _register() -> None:
    for name in COMMAND_MODULES:
        importlib.import_module(name).register(app)


def _print_version(value: bool) -> None:
    if value:
        from leadline import __version__

        typer.echo(f"leadline {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: Optional[bool] = typer.Option(
        None, "--version", callback=_print_version, is_eager=True, help="Print the version and exit."
    ),
) -> None:
    """Exact infinite-size QAOA energies for mixed-spin glasses (see --help of each command)."""


_register()


def _exception_kinds(exc: BaseException) -> set[str]:
    # typer may vendor its own copy of click, so match click's exception
    # classes by name rather than by identity
    return {cls.__name__ for cls in type(exc).__mro__}


def strict_numbers(command) -> None:
    """Make every float and int option of ``command`` (and its subcommands) parse strictly.

    click converts option values with Python's float/int, which accept ``1_000`` and digits of
    other scripts; a typo like ``--gradient-tol 1_e-7`` would then be a different number.  The options
    take ASCII decimal notation only (kernels/numtext.py), like every number leadline reads.
    """
    import click

    from leadline.kernels.numtext import parse_float, parse_int

    class StrictFloat(click.types.FloatParamType):
        def convert(self, value, param, ctx):
            if isinstance(value, str):
                try:
                    value = parse_float(value)
                except ValueError:
                    self.fail(f"{value!r} is not a number (ASCII decimal notation such as 0.5 or 1e-7)", param, ctx)
            return super().convert(value, param, ctx)

    class StrictInt(click.types.IntParamType):
        def convert(self, value, param, ctx):
            if isinstance(value, str):
                try:
                    value = parse_int(value)
                except ValueError:
                    self.fail(f"{value!r} is not a whole number (ASCII digits)", param, ctx)
            return super().convert(value, param, ctx)

    for param in getattr(command, "params", []):
        kind = type(param.type).__name__
        if kind == "FloatParamType":
            param.type = StrictFloat()
        elif kind == "IntParamType":
            param.type = StrictInt()
    for sub in getattr(command, "commands", {}).values():
        strict_numbers(sub)


def main(argv: list[str] | None = None) -> None:
    """Console entry point: user errors become one stderr line and exit code 2."""
    command = typer.main.get_command(app)
    strict_numbers(command)
    interrupted, restore = _note_interrupts()
    try:
        _main(command, argv, interrupted)
    except SystemExit as exc:
        if exc.code not in (0, None):
            _quiet_leftovers()
        raise
    finally:
        restore()


def _quiet_leftovers() -> None:
    """After the one line of a failed command: background writes that the failure cut short (zarr's
    asyncio tasks, when a full disk stops a store write) can report their own exceptions when they are
    collected at exit ("Future exception was never retrieved"), lines about consequences of the error
    already reported that would break its one-line promise. asyncio's logger is kept to critical."""
    import logging

    logging.getLogger("asyncio").setLevel(logging.CRITICAL)


def _main(command, argv, interrupted: list[int]) -> None:
    from leadline.cluster.workerenv import in_process_blas, in_process_threads

    try:
        try:
            threads = in_process_threads()
        except ValueError as exc:
            raise InputError(str(exc)) from None
        with in_process_blas(threads):
            rv = command.main(args=argv, prog_name="leadline", standalone_mode=False)
    except InputError as exc:
        print(f"leadline: error: {exc}", file=sys.stderr)
        sys.exit(2)
    except Stopped as exc:
        # the command said what it kept and how to go on
        print(f"leadline: {exc}", file=sys.stderr)
        sys.exit(exc.exit_code)
    except KeyboardInterrupt:
        print("leadline: interrupted", file=sys.stderr)
        sys.exit(130)
    except Exception as exc:
        kinds = _exception_kinds(exc)
        if "NoArgsIsHelpError" in kinds:
            exc.ctx and print(exc.ctx.get_help())
            sys.exit(0)
        if "NoSuchOption" in kinds and renamed_option(getattr(exc, "option_name", "") or ""):
            print(f"leadline: error: {renamed_option(exc.option_name)}", file=sys.stderr)
            sys.exit(2)
        if "UsageError" in kinds:
            ctx = getattr(exc, "ctx", None)
            where = ctx.command_path if ctx is not None else "leadline"
            print(f"leadline: error: {exc.format_message()} (see: {where} --help)", file=sys.stderr)
            sys.exit(2)
        if "Abort" in kinds:
            print("leadline: interrupted", file=sys.stderr)
            sys.exit(130)
        if "Exit" in kinds:
            sys.exit(getattr(exc, "exit_code", 0))
        if "EngineBreakdown" in kinds:
            # the bath engine gave a value it cannot have where a result was due: nothing was reported
            print(f"leadline: error: {exc}", file=sys.stderr)
            sys.exit(1)
        if "PassRangeError" in kinds:
            # a pass whose weights left the double range (kernels/exact/_ranges.py): one line, like bad input
            print(f"leadline: error: {exc}", file=sys.stderr)
            sys.exit(2)
        if "ClickException" in kinds:
            print(f"leadline: error: {exc.format_message()}", file=sys.stderr)
            sys.exit(getattr(exc, "exit_code", 1))
        if isinstance(exc, OSError):
            # the system refused a read or write (full disk, file-size limit, I/O error): one line, exit 1;
            # outputs are written through a temporary file and a rename, so no half-written file is left
            from .paths import os_error_text

            print(f"leadline: error: {os_error_text(exc)}", file=sys.stderr)
            sys.exit(1)
        raise
    if isinstance(rv, int) and rv:
        if rv == 130 and interrupted:
            # typer turns Ctrl-C into a silent exit code 130
            print("leadline: interrupted", file=sys.stderr)
        sys.exit(rv)


def _note_interrupts():
    """Record SIGINT arrivals (then raise KeyboardInterrupt as Python's default handler does).

    typer returns Ctrl-C as a bare exit code, so this is how ``main`` knows that a 130 was an
    interrupt.  Left alone where SIGINT is ignored or handled by someone else, or off the main
    thread.  Returns (the arrivals, a function that puts the previous handler back).
    """
    import signal
    import threading

    seen: list[int] = []
    if threading.current_thread() is not threading.main_thread():
        return seen, lambda: None
    previous = signal.getsignal(signal.SIGINT)
    if previous is not signal.default_int_handler:
        return seen, lambda: None

    def handler(signum, frame):
        seen.append(signum)
        raise KeyboardInterrupt

    signal.signal(signal.SIGINT, handler)
    return seen, lambda: signal.signal(signal.SIGINT, previous)


if __name__ == "__main__":  # pragma: no cover
    main()
