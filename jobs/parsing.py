"""Parsing of command-line values into kernel objects, with one-line errors."""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from leadline.kernels.mixture import Mixture, MixtureError, parse_mixture
from leadline.kernels.numtext import parse_float, parse_int

from .angles import check_periodic_angles
from .errors import InputError

__all__ = [
    "mixture_arg",
    "angles_arg",
    "angle_pair",
    "check_optimizer_options",
    "warm_start",
    "check_representable",
    "check_underflow",
    "file_mixture",
    "refuse_sparse_ground_states",
    "parse_ground_state_options",
    "parse_at_depths",
    "check_reference_settings",
]


def mixture_arg(spec: str | None, option: str = "--xi") -> Mixture:
    if spec is None:
        raise InputError(f"{option} is required: comma-separated q:w pairs, for example {option} 2:0.5")
    try:
        return parse_mixture(spec)
    except MixtureError as exc:
        raise InputError(f"{option}: {exc}") from None


def angles_arg(text: str | None, option: str) -> np.ndarray:
    """'0.1,-0.3,...' -> float array; rejects empty, non-numeric and non-finite entries."""
    if text is None or not str(text).strip():
        raise InputError(f"{option} needs comma-separated angles in radians, for example {option} 0.5,0.4")
    values = []
    for item in str(text).split(","):
        item = item.strip()
        try:
            x = parse_float(item)
        except ValueError:
            raise InputError(f"{option}: {item!r} is not a number (ASCII decimal notation such as 0.5 or -1e-3)") from None
        if not math.isfinite(x):
            raise InputError(f"{option}: angles must be finite, got {item!r}")
        values.append(x)
    return np.array(values, dtype=float)


def angle_pair(gamma: str | None, beta: str | None) -> tuple[np.ndarray, np.ndarray]:
    g = angles_arg(gamma, "--gamma")
    b = angles_arg(beta, "--beta")
    check_periodic_angles(b, "--beta", "beta_t", "pi")
    if g.size != b.size:
        raise InputError(f"--gamma has {g.size} angles but --beta has {b.size}; both need p values")
    return g, b


#: smallest --memory-mb accepted (2 KiB): the chunk planner's smallest chunk task takes about
#: 1 KiB at every depth, and a budget that rounds to 0 bytes would only fail later with a
#: message about the planner (tiny budgets are useful in tests: they force many chunks)
MIN_MEMORY_MB = 0.002


def check_memory_mb(memory_mb: float, option: str = "--memory-mb") -> float:
    """The memory budget of one chunk task in MiB: finite and at least MIN_MEMORY_MB."""
    if not (math.isfinite(memory_mb) and memory_mb >= MIN_MEMORY_MB):
        raise InputError(
            f"{option} must be a positive finite number of MiB, at least {MIN_MEMORY_MB:g} (the planner's smallest "
            f"chunk task takes about 1 KiB), got {memory_mb:g}"
        )
    return memory_mb


#: largest --gtol accepted: a gradient max-norm above it is not a stationary point of V_p
#: (values are O(1); common practice for double-precision quasi-Newton runs is 1e-5..1e-8)
MAX_GTOL = 1e-4


def check_optimizer_options(depth: int | None, restarts: int | None, gtol: float, maxiter: int, seed: int = 0) -> int:
    """Validate the options shared by dense and sparse `optimize`; returns the depth."""
    if depth is None:
        raise InputError("--depth is required (the depth p to optimize, >= 1)")
    if depth < 1:
        raise InputError(f"--depth must be >= 1, got {depth}")
    if restarts is not None and restarts < 0:
        raise InputError("--restarts must be >= 0")
    if not gtol > 0:
        raise InputError(
            f"--gtol must be a number in (0, {MAX_GTOL:g}], got {gtol:g}: the optimizer stops when the largest "
            "gradient component is below it, which a tolerance <= 0 never allows"
        )
    if not gtol <= MAX_GTOL:
        raise InputError(
            f"--gtol must be a number in (0, {MAX_GTOL:g}], got {gtol:g}: a larger tolerance stops the "
            "optimizer before a stationary point"
        )
    if maxiter < 1:
        raise InputError("--maxiter must be >= 1")
    if seed < 0:
        raise InputError(f"--seed must be >= 0, got {seed}")
    return depth


def warm_start(path: str | None, depth: int):
    """The angle file given with --angles (depth p-1 or p), or None."""
    from .angles import read_angles

    initial = read_angles(path) if path is not None else None
    if initial is not None:
        check_start_depth(initial.p, depth, "--angles")
    return initial


def check_start_depth(given: int, depth: int, option: str) -> None:
    """Start angles of depth ``given`` fit depth ``depth`` when given is depth - 1 (warm start) or depth."""
    if given not in (depth - 1, depth):
        raise InputError(
            f"{option} holds angles of depth {given}, which start depth {given} (as given) or depth {given + 1} "
            f"(warm start by interpolation), not --depth {depth}"
        )


def check_representable(mixture: Mixture, gamma, where: str = "--gamma", beta=None) -> None:
    """InputError (one line with the range) when these angles are beyond what double precision computes
    (kernels/exact/_ranges.py: exponents beyond 1e9, or at p = 1 a value below the smallest double)."""
    from leadline.kernels.exact import RangeError, check_range

    try:
        check_range(mixture, gamma, beta)
    except RangeError as exc:
        raise InputError(f"{where}: {exc}") from None


def check_underflow(value: float, mixture: Mixture, gamma, where: str = "--gamma") -> None:
    """InputError when V_p came out as 0 because it underflowed, not because it is 0.

    At p >= 2 nothing bounds V_p in advance (docs/limits.md), so a pass whose exponents reach
    beyond EXPONENT_LIMIT can return 0 for a value below 2.2e-308.  Near the origin
    (E <= EXPONENT_LIMIT) an exact 0 is a true value (for example gamma = 0).
    """
    from leadline.kernels.exact import EXPONENT_LIMIT, exponent_bound

    E = exponent_bound(mixture, gamma)
    if value == 0.0 and E > EXPONENT_LIMIT:
        raise InputError(
            f"{where}: V_p underflows at these angles: its modulus is below the smallest double "
            f"(2.2e-308), so it cannot be printed (E = 2 xi'(1) (sum|gamma|)^2 = {E:.3g}); smaller |gamma_t| give representable values"
        )


def file_mixture(xi: str | None, angle_set, path) -> Mixture:
    """The mixture of a dense run: --xi when given, else the angle file's own "xi"."""
    if xi is not None:
        return mixture_arg(xi)
    if angle_set.xi is None:
        raise InputError(f"--xi is required: the angle file {path} names no mixture (\"xi\": null)")
    try:
        return parse_mixture(angle_set.xi)
    except MixtureError as exc:
        raise InputError(f"angle file {path}: \"xi\": {exc}") from None


def refuse_sparse_ground_states(overrides: dict, study) -> None:
    """--ground-state is an energy density: refuse it for sparse ensembles (their value is a
    satisfied fraction, and a ratio of the two would mean nothing)."""
    for label in study.ensembles():
        kind = study.ensemble(label).get("kind", "dense")
        if kind != "sparse":
            continue
        if label in overrides or (None in overrides and len(study.ensembles()) == 1):
            raise InputError(
                f"--ground-state: ensemble {label!r} is sparse (its value is a satisfied fraction, not an "
                "energy density); ground-state energies apply to dense ensembles only"
            )
        if None in overrides:
            raise InputError(
                f"--ground-state VALUE would also apply to the sparse ensemble {label!r}; "
                "write LABEL=VALUE for the dense ensembles"
            )


def parse_ground_state_options(values: Sequence[str] | None, labels: Sequence[str]) -> dict:
    """['0.76', 'sk=0.763', ...] -> {None or label: float}; InputError on bad input.

    A bare VALUE applies to every ensemble and is only accepted when the study
    has exactly one ensemble, or as a default next to LABEL=VALUE entries.
    """
    out: dict = {}
    for text in values or []:
        label, sep, number = str(text).rpartition("=")
        label = label.strip() if sep else None
        try:
            value = parse_float(number)
        except ValueError:
            raise InputError(f"--ground-state {text!r}: expected VALUE or LABEL=VALUE with a number, e.g. --ground-state sk=0.763166") from None
        if not (math.isfinite(value) and value > 0):
            raise InputError(f"--ground-state {text!r}: the ground-state energy density must be a positive finite number")
        if label is not None and label not in labels:
            raise InputError(f"--ground-state {text!r}: no ensemble {label!r} in this study (ensembles: {', '.join(labels)})")
        if label in out:
            raise InputError(f"--ground-state given twice for {label or 'all ensembles'}")
        out[label] = value
    if None in out and len(labels) > 1 and len(out) == 1:
        raise InputError(
            "--ground-state VALUE is ambiguous with several ensembles: write LABEL=VALUE "
            f"(ensembles: {', '.join(labels)})"
        )
    return out


def parse_at_depths(text: str | None) -> tuple[int, ...]:
    """'50,100,160' -> (50, 100, 160); InputError on anything but positive integers."""
    if text is None:
        return ()
    out = []
    for part in str(text).split(","):
        part = part.strip()
        try:
            depth = parse_int(part)
        except ValueError:
            raise InputError(f"--at-depth {text!r}: expected comma-separated positive integers, e.g. --at-depth 50,100,160") from None
        if depth < 1:
            raise InputError(f"--at-depth {text!r}: depths must be >= 1")
        out.append(depth)
    return tuple(sorted(set(out)))


def check_reference_settings(gs_tol: float, alg_tol: float, max_steps: int) -> None:
    """Tolerances and step limit of a reference-energy computation (`leadline reference`, the API)."""
    for name, tol in (("--gs-tol", gs_tol), ("--alg-tol", alg_tol)):
        if not (math.isfinite(tol) and 1e-7 <= tol <= 0.1):
            raise InputError(f"{name} must be between 1e-7 and 0.1, got {tol!r}")
    if not 3 <= max_steps <= 30:
        raise InputError(f"--max-steps must be between 3 and 30, got {max_steps}")
