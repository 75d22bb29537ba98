"""`leadline transfer`: carry ensemble-optimal angles to a concrete instance, and check them exactly.

    leadline transfer INSTANCE [--angles FILE | --store STORE [--ensemble LABEL] | --depth P]
                               [--max-spins N] [--json] [--output angles.csv]

Steps: read the instance (text or JSON, kernels/finite_size/_instance.py); its empirical
mixture xi_instance; the reference angles (an angle file, a study's optimum, or
an optimization for xi_instance itself); gamma / lambda with
lambda^2 = xi_instance(1) / xi_reference(1); the predicted <C>; for sparse
instances the finite-degree prediction (and the girth for q = 2); for
n <= --max-spins the exact statevector QAOA.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path
from typing import Optional

import numpy as np
import typer

from leadline.kernels.finite_size import (
    DEFAULT_STATEVECTOR_SPINS,
    MAX_STATEVECTOR_SPINS,
    InstanceError,
    empirical_mixture,
    girth,
    parse_instance,
    rescale_angles,
    sparse_prediction,
    sparse_reference,
    statevector_bytes,
    statevector_check,
)
from leadline.kernels.mixture import Mixture, MixtureError, parse_mixture

from leadline.kernels.exact import plan_chunks
from leadline.kernels.numtext import fmt, fmt_list

from ..cost import COST_NOTE_SECONDS, check_cost, check_depth
from ..errors import InputError
from ..paths import check_output_file, write_text_atomic

#: largest depth for which the finite-degree prediction (cost ~ p 4^p) is computed
SPARSE_PREDICTION_MAX_P = 10
#: cycles up to this length are searched for (longer when 2p + 2 is larger)
GIRTH_SEARCH = 16
#: a graph whose spins are all in at most this many terms counts as low-degree (sparse ensemble fits better)
LOW_DEGREE = 16
#: largest depth at which the sparse ensemble's angles are optimized and checked for a weighted low-degree graph
SPARSE_ANGLES_MAX_P = 6
#: default largest total-variation distance between normalized mixtures counted as "same shape"
DEFAULT_SHAPE_TOLERANCE = 0.02


def transfer_command(
    instance: Optional[str] = typer.Argument(None, help="Instance file: text (weight then spin indices per line) or JSON (docs/transfer.md)."),
    angles: Optional[str] = typer.Option(None, "--angles", help="Angle file (JSON from `leadline optimize --output`) to transfer."),
    store: Optional[str] = typer.Option(None, "--store", help="Study store (from `leadline sweep`): transfer its optimum."),
    ensemble: Optional[str] = typer.Option(None, "--ensemble", help="Ensemble label in --store (needed when the study has several)."),
    depth: Optional[int] = typer.Option(
        None, "--depth", help="Depth p. Alone: optimize angles for the instance's own mixture (as `optimize` does). "
        "With --store: which finished depth to take (default the deepest). With --angles: must match the file."
    ),
    max_spins: int = typer.Option(DEFAULT_STATEVECTOR_SPINS, "--max-spins", help=f"Largest n for the exact statevector check (at most {MAX_STATEVECTOR_SPINS}; n = 24 needs about 0.4 GiB, 26 about 1.6 GiB)."),
    shape_tolerance: float = typer.Option(DEFAULT_SHAPE_TOLERANCE, "--shape-tolerance", help="Largest distance (0..1) between the normalized mixtures of instance and angle source counted as the same shape."),
    seed: int = typer.Option(0, "--seed", help="Seed of the optimizer's restarts (with --depth alone)."),
    output: Optional[str] = typer.Option(None, "--output", "-o", help="Write the instance-unit angles as CSV (t, gamma, beta) with the circuit convention in a header comment."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of a report."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No memory line and no progress bar on stderr."),
) -> None:
    """Angles for a concrete instance: rescale ensemble-optimal angles, predict <C>, check exactly at small n.

    The instance's cost C(z) = sum of weight * product of its spins is maximized.

    Examples:

        leadline transfer graph.txt --angles sk-p3.json

        leadline transfer graph.txt --depth 2 --json

        leadline transfer graph.txt --store runs/sk.zarr --ensemble sk --output angles.csv
    """
    out = transfer_instance(instance, angles=angles, store=store, ensemble=ensemble, depth=depth, max_spins=max_spins,
                            shape_tolerance=shape_tolerance, seed=seed, output=output, quiet=quiet)
    if as_json:
        typer.echo(json.dumps(out))
        return
    typer.echo(report(out, parse_mixture(out["xi"])))


def transfer_instance(instance: str | None, *, angles: str | None = None, store: str | None = None,
                      ensemble: str | None = None, depth: int | None = None,
                      max_spins: int = DEFAULT_STATEVECTOR_SPINS, shape_tolerance: float = DEFAULT_SHAPE_TOLERANCE,
                      seed: int = 0, output: str | None = None, quiet: bool = True) -> dict:
    """What `leadline transfer` computes (the object it prints with --json); InputError on bad input."""
    # ------------------------------------------------------------ validate everything first
    inst, source_name = _read_instance(instance)
    if angles is not None and store is not None:
        raise InputError("give either --angles FILE or --store STORE, not both")
    if ensemble is not None and store is None:
        raise InputError("--ensemble needs --store STORE")
    if depth is not None and depth < 1:
        raise InputError(f"--depth must be >= 1, got {depth}")
    if not 1 <= max_spins <= MAX_STATEVECTOR_SPINS:
        raise InputError(f"--max-spins must be between 1 and {MAX_STATEVECTOR_SPINS}, got {max_spins}")
    if not 0 < shape_tolerance <= 1:
        raise InputError(f"--shape-tolerance must be in (0, 1], got {shape_tolerance}")
    if seed < 0:
        raise InputError(f"--seed must be >= 0, got {seed}")
    if output is not None:
        check_output_file(output)
        if angles is None and store is None and depth is None:
            raise InputError("--output needs angles: give --angles, --store or --depth")
    xi = _instance_mixture(inst, source_name)
    reference = None
    if angles is not None:
        reference = _reference_from_file(angles, depth)
    elif store is not None:
        reference = _reference_from_store(store, ensemble, depth)
    elif depth is not None:
        # the same depth and cost checks as `leadline optimize` (an optimization with gradients)
        check_depth(depth, "--depth")
        cost = check_cost(depth, plan_chunks(depth), None, gradient=True, option="--depth")
        if not quiet and cost.core_seconds >= COST_NOTE_SECONDS:
            print(f"leadline: {cost.line('one evaluation with gradient')}; an optimization runs tens to hundreds", file=sys.stderr)
    if reference is not None and reference["kind"] == "infinite-size ensemble":
        check_depth(len(reference["gamma"]), "--angles" if angles is not None else "--store")

    started = time.perf_counter()
    out = {
        "instance": source_name,
        "n": inst.n,
        "terms": len(inst.terms),
        "orders": {str(q): c for q, c in inst.orders().items()},
        "constant": inst.constant,
        "xi": xi.spec(),
        "source": None,
        "p": None,
        "lambda": None,
        "reference_xi": None,
        "shape_distance": None,
        "same_shape": None,
        "gamma": None,
        "beta": None,
        "predicted": None,
        "predicted_from": None,
        "sparse": None,
        "predicted_finite_degree": None,
        "girth": None,
        "girth_above": None,
        "expectation": None,
        "best": None,
        "worst": None,
        "ratio": None,
        "p_best": None,
        "best_string": None,
        "statevector_memory_bytes": None,
        "degrees": None,
        "sparse_angles": None,
        "notes": [],
    }
    notes = out["notes"]

    # ------------------------------------------------------------ angles in instance units
    gamma = beta = None
    if reference is not None:
        scale = rescale_angles(xi, reference["xi"], reference["gamma"])
        gamma, beta = scale.gamma, np.asarray(reference["beta"], dtype=float)
        same = scale.distance <= shape_tolerance
        out.update(source=reference["source"], p=int(gamma.size), shape_distance=scale.distance, same_shape=same)
        out["lambda"] = scale.lam
        out["reference_xi"] = reference["xi"].spec()
        if same and reference["value"] is not None:
            per_spin = scale.lam * reference["value"]
            out["predicted_from"] = f"constant + n lambda V_p, {reference['kind']}"
        else:
            out["predicted_from"] = "constant + n V_p of the instance's own mixture at these angles (infinite size)"
            per_spin = _dense_value(xi, gamma, beta)
        if not same:
            notes.append(
                f"the instance's mixture differs in shape from the angle source's (distance {scale.distance:.3f} > "
                f"{shape_tolerance}): gamma is scaled by the total variance only and the angles are not optimal "
                f"for this instance; --depth {gamma.size} optimizes for the instance's own mixture"
            )
        out["predicted"] = _bounded(inst, inst.constant + inst.n * per_spin, notes)
    elif depth is not None:
        from leadline.kernels.optimize import optimize_depth

        previous = previous_value = None
        for p in range(1, depth + 1):
            result = optimize_depth(xi, p, previous=previous, previous_value=previous_value, seed=seed)
            previous, previous_value = (result.gamma, result.beta), result.value
        gamma, beta = result.gamma, result.beta
        out.update(source=f"optimized for the instance's mixture {xi.rounded_spec()}", p=depth, shape_distance=0.0, same_shape=True)
        out["lambda"] = 1.0
        out["reference_xi"] = xi.spec()
        out["predicted"] = _bounded(inst, inst.constant + inst.n * result.value, notes)
        out["predicted_from"] = "constant + n V_p*, infinite-size ensemble of the instance's mixture"
    else:
        notes.append("no angles given (--angles, --store or --depth): only the mixture and the best value are reported")
    if gamma is not None:
        out["gamma"] = [float(x) for x in gamma]
        out["beta"] = [float(x) for x in beta]

    # ------------------------------------------------------------ sparse instances
    structure = inst.sparse_structure()
    if structure is not None:
        out["sparse"] = {"q": structure.q, "degree": structure.degree, "weight": structure.magnitude, "terms": structure.terms}
        if structure.q == 2:
            limit = max(GIRTH_SEARCH, 2 * int(gamma.size) + 2) if gamma is not None else GIRTH_SEARCH
            found = girth(inst.n, inst.edges(), limit=limit)
            out["girth"] = found
            if found is None:
                out["girth_above"] = limit
        if gamma is not None:
            p = gamma.size
            if structure.degree < 2:
                notes.append("every spin is in one term only: no finite-degree prediction (needs D >= 2)")
            elif p > SPARSE_PREDICTION_MAX_P:
                notes.append(f"finite-degree prediction skipped at p = {p} > {SPARSE_PREDICTION_MAX_P} (cost grows like 4^p)")
            else:
                out["predicted_finite_degree"] = sparse_prediction(structure, inst.n, inst.constant, gamma, beta)
                if structure.q == 2:
                    if out["girth"] is not None and out["girth"] <= 2 * p + 1:
                        notes.append(
                            f"girth {out['girth']} <= 2p+1 = {2 * p + 1}: some radius-p neighbourhoods contain cycles, "
                            "so the finite-degree prediction is approximate"
                        )
                    else:
                        notes.append(f"girth > 2p+1 = {2 * p + 1}: the finite-degree prediction is exact for this graph")
                else:
                    notes.append("the finite-degree prediction assumes hypertree neighbourhoods (girth not computed for q > 2)")

    # ------------------------------------------------------------ exact check
    if inst.n <= max_spins:
        memory = statevector_bytes(inst.n)
        out["statevector_memory_bytes"] = memory
        if not quiet:
            print(f"leadline: exact check on n = {inst.n} spins (2^{inst.n} amplitudes), about {_mib(memory)} of memory", file=sys.stderr)
        with _progress_bar(quiet, inst.n) as advance:
            check = statevector_check(inst, gamma, beta, progress=advance)
        out.update(best=check.best, worst=check.worst, best_string=check.best_string)
        if gamma is not None:
            out.update(expectation=check.expectation, ratio=check.ratio, p_best=check.p_best)
            if check.ratio is None:
                notes.append("best value <= 0: the ratio expectation/best is not reported")
    else:
        notes.append(f"n = {inst.n} > --max-spins {max_spins}: no exact check (at most {MAX_STATEVECTOR_SPINS})")
    if structure is None:
        _weighted_low_degree(inst, xi, gamma, beta, out, seed)
    out["wall_time_s"] = time.perf_counter() - started

    if output is not None and gamma is not None:
        _write_csv(output, gamma, beta, out)
    return out


def _weighted_low_degree(inst, xi: Mixture, gamma, beta, out: dict, seed: int) -> None:
    """A graph of one order whose spins are in few terms, with weights of several sizes: the dense
    ensemble is only its D -> infinity limit.  Say which ensemble fits it (degree, girth) and, when
    its degree is regular, compare the sparse ensemble's angles on the exact check."""
    orders = inst.orders()
    if len(orders) != 1:
        return
    (q,) = orders
    counts = np.zeros(inst.n, dtype=np.int64)
    for S in inst.terms:
        counts[list(S)] += 1
    d_min, d_max = int(counts.min()), int(counts.max())
    if q < 2 or d_max > LOW_DEGREE or d_min < 1:
        return
    sizes = np.abs(np.fromiter(inst.terms.values(), dtype=float))
    unequal = not np.allclose(sizes, sizes[0], rtol=1e-12, atol=0)
    p = None if gamma is None else int(np.asarray(gamma).size)
    out["degrees"] = {"q": int(q), "min": d_min, "max": d_max, "mean": float(counts.mean())}
    where = f"{d_min} terms" if d_min == d_max else f"{d_min} to {d_max} terms"
    text = f"every spin is in {where} of order {q}"
    if q == 2:
        limit = max(GIRTH_SEARCH, 2 * (p or 0) + 2)
        found = girth(inst.n, inst.edges(), limit=limit)
        out["girth"], out["girth_above"] = found, (limit if found is None else None)
        text += f", girth {found}" if found is not None else f", girth > {limit}"
    D = round(float(counts.mean()))
    text += ", weights of several sizes" if unequal else ""
    text += (f": closer to the sparse ensemble (q = {q}, D = {D}) than to the dense one, "
             "which is its large-degree limit")
    notes = out["notes"]
    if d_min != d_max or d_min < 2 or gamma is None or p > SPARSE_ANGLES_MAX_P or out["ratio"] is None:
        depth = p or 2
        notes.append(text + f"; sparse angles: leadline optimize --sparse-q {q} --degree {D} --depth {depth} "
                     f"--output sparse.json, then leadline transfer {out['instance']} --angles sparse.json")
        return
    from leadline.kernels.sparse import optimize_sparse

    ladder = previous = previous_value = None
    for depth in range(1, p + 1):  # warm-started depth by depth, as `optimize --sparse-q` does
        ladder = optimize_sparse(q, D, depth, previous=previous, previous_value=previous_value, seed=seed,
                                 restarts=3 if depth <= 2 else 1)
        previous, previous_value = (ladder.gamma, ladder.beta), ladder.value
    xi_s, g_s, _ = sparse_reference(q, D, ladder.gamma, ladder.value)
    g_inst = rescale_angles(xi, xi_s, g_s).gamma  # scaled by the weights' variance
    check = statevector_check(inst, g_inst, ladder.beta)
    better = check.ratio is not None and check.ratio > out["ratio"]
    out["sparse_angles"] = {"q": int(q), "degree": D, "p": p, "gamma": [float(x) for x in g_inst],
                            "beta": [float(x) for x in ladder.beta], "expectation": check.expectation,
                            "ratio": check.ratio, "better": bool(better)}
    notes.append(
        text + f"; its optimal angles at p = {p} (instance units) give ratio {_fmt(check.ratio)} against "
        f"{_fmt(out['ratio'])} for the angles above"
        + (": they fit this instance better (`--json` has them under sparse_angles)" if better else "")
    )


def _bounded(inst, predicted: float, notes: list) -> float | None:
    """The ensemble prediction, or None (with a note) where it leaves the range C can take.

    |C(z) - constant| <= sum_S |w_S| for every string z, so a prediction beyond that bound is
    not a value of this instance: the infinite-size ensemble describes instances with many
    terms per spin, and one with few (a single term among many spins) is outside its reach.
    """
    reach = float(sum(abs(w) for w in inst.terms.values()))
    if abs(predicted - inst.constant) <= reach * (1.0 + 1e-12):
        return predicted
    notes.append(
        f"no ensemble prediction: constant + n V_p = {fmt(predicted)} lies outside the range every C(z) lies in, "
        f"constant +- sum |weights| = {fmt(inst.constant)} +- {fmt(reach)}; the infinite-size ensemble describes "
        f"instances with many terms per spin, and this one has {len(inst.terms)} term(s) on n = {inst.n} spins"
    )
    return None


def _instance_mixture(inst, source: str) -> Mixture:
    """The empirical mixture, or InputError when its weights leave the range leadline computes in."""
    try:
        return empirical_mixture(inst)
    except MixtureError as exc:
        raise InputError(
            f"instance {source}: its mixture (w_q = sum of weight^2 / n) cannot be used: {exc}. "
            "The cost scales exactly: for C/c the angles are c gamma and <C/c> = <C>/c"
        ) from None


# --------------------------------------------------------------------------- inputs
def _read_instance(path: str | None):
    if path is None:
        raise InputError("give an instance file: leadline transfer INSTANCE (format: docs/transfer.md)")
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8-sig")  # UTF-8, a leading BOM accepted
    except FileNotFoundError:
        raise InputError(f"instance file {path} does not exist") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"instance file {path} cannot be read: {exc}") from None
    try:
        return parse_instance(text, source=str(path)), str(path)
    except InstanceError as exc:
        raise InputError(str(exc)) from None


def _mixture(spec, where: str) -> Mixture:
    try:
        return parse_mixture(spec)
    except (MixtureError, TypeError) as exc:
        raise InputError(f"{where}: mixture {spec!r} cannot be used ({exc})") from None


def _reference(kind, xi_spec, q, degree, gamma, beta, value, source: str) -> dict:
    gamma = np.asarray(gamma, dtype=float)
    if kind == "sparse":
        try:
            q, degree = int(q), float(degree)
        except (TypeError, ValueError):
            raise InputError(f"{source}: sparse ensemble without a usable q and degree") from None
        xi, gamma, per_spin = sparse_reference(q, degree, gamma, value)
        return {"xi": xi, "gamma": gamma, "beta": beta, "value": per_spin, "source": source,
                "kind": f"sparse ensemble q = {q}, D = {degree:g}, large girth"}
    xi = _mixture(xi_spec, source)
    return {"xi": xi, "gamma": gamma, "beta": beta, "value": value, "source": source, "kind": "infinite-size ensemble"}


def _reference_from_file(path: str, depth: int | None) -> dict:
    from ..angles import read_angles

    aset = read_angles(path)
    if depth is not None and depth != aset.p:
        raise InputError(f"--depth {depth} does not match the angle file's depth {aset.p}")
    ens = aset.ensemble or {}
    kind = "sparse" if aset.xi is None and ens.get("kind") == "sparse" else "dense"
    if kind == "dense" and aset.xi is None:
        raise InputError(f"angle file {path} has no mixture xi: cannot rescale its angles")
    return _reference(kind, aset.xi, ens.get("q"), ens.get("degree"), aset.gamma, aset.beta, aset.value,
                      f"angle file {path} (p = {aset.p})")


def _reference_from_store(path: str, label: str | None, depth: int | None) -> dict:
    from ..report import load_study

    study = load_study(path)
    labels = study.ensembles()
    if label is None:
        if len(labels) != 1:
            raise InputError(f"--ensemble is needed: study {path} has ensembles {', '.join(labels)}")
        label = labels[0]
    if label not in labels:
        raise InputError(f"--ensemble {label!r} is not in study {path} (have {', '.join(labels)})")
    info = study.ensemble(label)
    done = study.depths(label)
    if not done:
        raise InputError(f"ensemble {label!r} in study {path} has no finished depth yet")
    if depth is None:
        row = done[-1]
    else:
        row = next((r for r in done if r["p"] == depth), None)
        if row is None:
            raise InputError(f"ensemble {label!r} has no finished depth {depth} (finished: {', '.join(str(r['p']) for r in done)})")
    return _reference(info.get("kind", "dense"), info.get("xi"), info.get("q"), info.get("degree"),
                      row["gamma"], row["beta"], row.get("value"), f"study {path}, ensemble {label}, p = {row['p']}")


def _dense_value(xi: Mixture, gamma, beta) -> float:
    from leadline.kernels.exact import evaluate

    return float(evaluate(xi, gamma, beta).value)


# --------------------------------------------------------------------------- outputs
def _mib(nbytes: int) -> str:
    return f"{nbytes / 2**30:.1f} GiB" if nbytes >= 2**30 else f"{nbytes / 2**20:.0f} MiB"


class _progress_bar:
    """A rich bar on stderr for the statevector layers (only on a terminal, and only for n >= 16)."""

    def __init__(self, quiet: bool, n: int):
        from leadline.cluster.progress import progress_wanted

        self.enabled = n >= 16 and progress_wanted(quiet)
        self.progress = None
        self.task = None

    def __enter__(self):
        if not self.enabled:
            return None
        from rich.console import Console
        from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

        self.progress = Progress(TextColumn("statevector"), BarColumn(), MofNCompleteColumn(), TextColumn("layer steps, ETA"),
                                 TimeRemainingColumn(), console=Console(stderr=True), transient=True)
        self.progress.start()
        self.task = self.progress.add_task("statevector", total=None)

        def advance(done: int, total: int) -> None:
            self.progress.update(self.task, completed=done, total=total)

        return advance

    def __exit__(self, *exc):
        if self.progress is not None:
            self.progress.stop()
        return False


CSV_HEADER = """# QAOA angles for {instance} in the units of its cost C (C is maximized).
# State: |gamma, beta> = prod_{{t=1..p}} exp(-i beta_t sum_j X_j) exp(-i gamma_t C) |+>^n, layer t = 1 applied first.
# z_j = +1 is |0>, z_j = -1 is |1>, so a term w z_i z_j is the phase exp(-i gamma_t w Z_i Z_j) = RZZ(2 gamma_t w)
# and a term w z_i is RZ(2 gamma_t w) (RZ(a) = exp(-i a Z / 2)); the mixer is RX(2 beta_t) on every qubit.
# Source: {source}; lambda = {lam:.10g}; predicted <C> = {predicted}.
t,gamma,beta
"""


def _write_csv(path: str, gamma, beta, out: dict) -> None:
    predicted = "n/a" if out["predicted"] is None else f"{out['predicted']:.10g}"
    text = CSV_HEADER.format(instance=out["instance"], source=out["source"], lam=out["lambda"], predicted=predicted)
    text += "".join(f"{t},{g!r},{b!r}\n" for t, (g, b) in enumerate(zip(map(float, gamma), map(float, beta)), start=1))
    write_text_atomic(path, text)


def _fmt(x, digits: int = 6) -> str:
    return "-" if x is None else fmt(x, digits)


def report(out: dict, xi: Mixture) -> str:
    orders = ", ".join(f"{c} of order {q}" for q, c in out["orders"].items())
    lines = [
        f"instance        = {out['instance']}: n = {out['n']} spins, {out['terms']} terms ({orders})"
        + (f", constant {out['constant']:g}" if out["constant"] else ""),
        f"mixture xi(x)   = {xi.label()}   (w_q = sum of weight^2 over terms of order q, / n)",
    ]
    if out["sparse"]:
        s = out["sparse"]
        lines.append(f"sparse          = every spin in {s['degree']} terms of order {s['q']}, weights +-{s['weight']:g}")
        if out["girth"] is not None:
            lines.append(f"girth           = {out['girth']}")
        elif out["girth_above"] is not None:
            lines.append(f"girth           > {out['girth_above']}")
    if out["gamma"] is not None:
        lines += [
            f"angles from     = {out['source']}",
            f"depth p         = {out['p']}",
            f"lambda          = {fmt(out['lambda'])}   (xi_instance = lambda^2 xi_source; shape distance {out['shape_distance']:.3f})",
            "gamma           = " + fmt_list(out["gamma"]) + "   (instance units: source gamma / lambda)",
            "beta            = " + fmt_list(out["beta"]),
            f"predicted <C>   = {_fmt(out['predicted'])}   "
            + (f"({out['predicted_from']})" if out["predicted"] is not None else "(none: see the note below)"),
        ]
        if out["predicted_finite_degree"] is not None:
            lines.append(f"finite degree   = {_fmt(out['predicted_finite_degree'])}   (sparse ensemble of the same q and D)")
    if out["best"] is not None:
        if out["expectation"] is not None:
            lines.append(f"exact <C>       = {_fmt(out['expectation'])}   (statevector)")
        lines.append(f"best C          = {_fmt(out['best'])}   (over all 2^{out['n']} strings, e.g. {out['best_string']})")
        if out["expectation"] is not None:
            lines.append(f"ratio <C>/best  = {_fmt(out['ratio'])}")
            lines.append(f"P(best string)  = {_fmt(out['p_best'])}")
    for note in out["notes"]:
        lines.append(f"note: {note}")
    if out["statevector_memory_bytes"] is not None:
        lines.append(f"({out['wall_time_s']:.1f} s; statevector memory about {_mib(out['statevector_memory_bytes'])})")
    else:
        lines.append(f"({out['wall_time_s']:.1f} s)")
    return "\n".join(lines)


def register(app: typer.Typer) -> None:
    app.command("transfer")(transfer_command)
