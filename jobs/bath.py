"""The bath method of `optimize` and of sweeps: engine settings, option checks, checkpointed map.

The kernel is :func:`leadline.kernels.bath.optimize_bath_depth`; this module turns the user's
options into its engine settings, checks the options the bath method does not have (and the
reverse), and gives sweeps a ``run_map`` that checkpoints every bath evaluation.  The depth
ladder (:func:`leadline.jobs.ladders.bath_ladder`) lives next to the exact one in ladders.py.
"""

from __future__ import annotations

from .errors import InputError
from .evaluations import SavedEvaluations, evaluation_key

__all__ = ["DEFAULT_FOCK", "DEFAULT_TAIL", "DEFAULT_BOND", "DEFAULT_BASIS", "engine_settings",
           "check_optimize_method", "bath_restarts", "CheckpointedEvaluations"]

METHODS = ("exact", "bath")


def engine_settings(tolerance: float | None = None, fock: int | None = None, bond: int | None = None) -> dict:
    """Keyword arguments of ``evaluate_bath`` from --tolerance/--fock/--bond (engine defaults when None)."""
    from leadline.kernels.bath import DEFAULT_BOND_CAP, DEFAULT_FOCK_CAP, DEFAULT_TOLERANCE

    return {
        "tolerance": DEFAULT_TOLERANCE if tolerance is None else float(tolerance),
        "fock_cap": DEFAULT_FOCK_CAP if fock is None else int(fock),
        "bond_cap": DEFAULT_BOND_CAP if bond is None else int(bond),
    }


def check_engine_values(tolerance, fock, bond, *, names=("--tolerance", "--fock", "--bond")) -> None:
    """Ranges of the bath engine settings, as `evaluate --method bath` checks them (one InputError line)."""
    from .commands._evaluate_bath import BOND_RANGE, FOCK_RANGE, TOLERANCE_RANGE

    for name, value, (lo, hi), integer in ((names[0], tolerance, TOLERANCE_RANGE, False),
                                           (names[1], fock, FOCK_RANGE, True), (names[2], bond, BOND_RANGE, True)):
        if value is None:
            continue
        if isinstance(value, bool) or not isinstance(value, (int, float)) or (integer and not isinstance(value, int)):
            raise InputError(f"{name} must be {'an integer' if integer else 'a number'}, got {value!r}")
        if not lo <= value <= hi:
            raise InputError(f"{name} must be between {lo:g} and {hi:g}, got {value:g}")


def check_optimize_method(method: str, *, tolerance=None, fock=None, bond=None, memory_mib=None,
                          sparse: bool = False) -> bool:
    """Validate the method options of `optimize`; True when the bath method is asked for."""
    if method not in METHODS:
        raise InputError(f"--method must be one of {', '.join(METHODS)}, got {method!r}")
    if method == "exact":
        for name, value in (("--tolerance", tolerance), ("--fock", fock), ("--bond", bond)):
            if value is not None:
                raise InputError(f"{name} applies only to --method bath")
        return False
    if sparse:
        raise InputError("--method bath is for the mixed-spin (dense) model, not --sparse-q/--degree")
    if memory_mib is not None:
        raise InputError("--memory-mib sets the chunk plan of the exact method; --method bath has none (drop it)")
    check_engine_values(tolerance, fock, bond)
    return True


def bath_restarts(restarts: int | None, warm: bool, p: int) -> int:
    """Extra starts of a bath depth: as given, else none after a warm start, else the exact default."""
    from leadline.kernels.optimize import default_restarts

    if restarts is not None:
        return int(restarts)
    return 0 if warm else default_restarts(p)


class CheckpointedEvaluations(SavedEvaluations):
    """A ``run_map`` for bath evaluations that reads finished ones from the depth's store.

    Every evaluation is keyed by a content fingerprint of (mixture, angles, engine settings)
    and written into the depth's pass batches (kind "bath": value, error estimate, CPU
    seconds), following the checkpoint policy (at once when ``interval-s = 0``).  A depth
    that is killed and resumed replays the deterministic optimizer; every evaluation it had
    finished is read back bit for bit, so the resumed depth follows the same path and gives
    the same numbers (jobs/evaluations.py).
    """

    kind = "bath"
    crash_name = "bath-evaluations-cached"

    def __init__(self, depth, executor):
        super().__init__(depth)
        self.executor = executor

    @staticmethod
    def key(task) -> str:
        mixture, gamma, beta, engine = task
        return evaluation_key("bath", {"xi": mixture.spec(), "engine": engine}, gamma, beta)

    def __call__(self, func, tasks) -> list:
        tasks = list(tasks)
        keys = [self.key(t) for t in tasks]
        out: list = [None] * len(tasks)
        missing = []
        for i, key in enumerate(keys):
            cached = self.lookup(key)
            if cached is not None:
                out[i] = (float(cached[0].real), float(cached[1].real), float(cached[2].real))
            else:
                missing.append(i)
        if missing:
            run_map = getattr(self.executor, "run_map", None)
            results = run_map(func, [tasks[i] for i in missing]) if run_map else [func(tasks[i]) for i in missing]
            for i, res in zip(missing, results):
                out[i] = tuple(float(x) for x in res)
                self.record(keys[i], out[i], len(tasks[i][1]), float(res[2]))
            self.write_if_due()
        return out
