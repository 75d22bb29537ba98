"""Progress bar for long passes and long optimizations (rich).

One display per executor.  It stays invisible for short work: nothing is
drawn until ``delay_s`` seconds after the first pass started, so a p = 3
evaluation prints no bar.  It is off with ``--quiet`` and whenever stdout is
not a terminal (pipes, CI, batch logs); it draws on stderr so that stdout
keeps only the result.

One row counts chunks done / total over the passes seen so far (or over the
whole job when the caller announced how many passes it will run, which makes
the ETA the job's ETA); during an optimization its label shows the number of
evaluations and the best value so far.
"""

from __future__ import annotations

import sys
import time

__all__ = ["ProgressDisplay", "progress_wanted"]


def progress_wanted(quiet: bool, stream=None) -> bool:
    """True unless --quiet or stdout is not a terminal."""
    stream = sys.stdout if stream is None else stream
    if quiet:
        return False
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):
        return False


class ProgressDisplay:
    """Chunks done / total with an ETA; a no-op when disabled.

    Parameters
    ----------
    enabled : draw anything at all
    delay_s : seconds of work before the bar appears (keeps short runs silent)
    """

    def __init__(self, enabled: bool, delay_s: float = 1.0):
        self.enabled = bool(enabled)
        self.delay_s = float(delay_s)
        self._progress = None
        self._started = False
        self._t_first: float | None = None
        self._job_passes: int | None = None
        self._chunks_per_pass: int | None = None
        self._pass_task = None
        self._passes = 0
        self._best: float | None = None
        self._evaluations = 0
        self._label: str | None = None

    # ------------------------------------------------------------------ setup
    def _ensure(self):
        if not self.enabled or self._progress is not None:
            return self._progress
        from rich.console import Console
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeElapsedColumn,
            TimeRemainingColumn,
        )

        self._progress = Progress(
            TextColumn("{task.description}"),
            BarColumn(),
            MofNCompleteColumn(),
            TextColumn("chunks"),
            TimeElapsedColumn(),
            TextColumn("ETA"),
            TimeRemainingColumn(),
            console=Console(stderr=True),
            transient=False,
            auto_refresh=True,
        )
        self._pass_task = self._progress.add_task("passes", total=0)
        return self._progress

    def _maybe_show(self) -> None:
        if self._progress is None or self._started or self._t_first is None:
            return
        if time.perf_counter() - self._t_first >= self.delay_s:
            self._progress.start()
            self._started = True

    # ------------------------------------------------------------------ job
    def announce_job(self, description: str, passes: int, chunks_per_pass: int) -> None:
        """Declare the whole job up front (e.g. an evaluation: p forward + p+1 backward passes)."""
        prog = self._ensure()
        if prog is None:
            return
        self._job_passes = int(passes)
        self._chunks_per_pass = int(chunks_per_pass)
        prog.update(self._pass_task, description=description, total=passes * chunks_per_pass)

    # ------------------------------------------------------------------ passes
    def pass_started(self, n_chunks: int, already_done: int = 0) -> None:
        prog = self._ensure()
        if prog is None:
            return
        if self._t_first is None:
            self._t_first = time.perf_counter()
        self._passes += 1
        task = prog.tasks[0]
        if self._job_passes is None or self._passes > self._job_passes:
            prog.update(self._pass_task, total=(task.total or 0) + n_chunks)
        if already_done:
            prog.advance(self._pass_task, already_done)
        self._maybe_show()

    def chunks_done(self, n: int = 1) -> None:
        if self._progress is None:
            return
        self._progress.advance(self._pass_task, n)
        self._maybe_show()

    # ------------------------------------------------------------------ optimizations
    def evaluation_done(self, value: float | None = None, label: str = "optimize", detail: str = "",
                        count: int = 1) -> None:
        """``count`` more evaluations of an optimization; keeps the best value seen (maximization).

        The bar's label becomes e.g. "optimize: 12 evaluations, best V = 0.4075...", followed by
        ``detail`` (the bath method: the error estimate and the time per evaluation).
        """
        prog = self._ensure()
        if prog is None:
            return
        if self._t_first is None:  # an optimization without passes (bath, sparse): the delay starts here
            self._t_first = time.perf_counter()
        if label != self._label:  # a new optimization (e.g. the next depth)
            self._label, self._evaluations, self._best = label, 0, None
        self._evaluations += count
        if value is not None and (self._best is None or value > self._best):
            self._best = float(value)
        text = f"{label}: {self._evaluations} evaluations"
        if self._best is not None:
            text += f", best V = {self._best:.10f}"
        text += detail
        prog.update(self._pass_task, description=text)
        self._maybe_show()

    def close(self) -> None:
        if self._progress is not None and self._started:
            self._progress.stop()
        self._progress = None
        self._started = False
