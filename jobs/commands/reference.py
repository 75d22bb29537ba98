"""`leadline reference`: ground-state energy and algorithmic threshold of a mixture."""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Optional

import typer

from leadline.kernels.numtext import fmt
from .. import reference_cache
from ..errors import InputError
from ..parsing import check_reference_settings, mixture_arg
from ..report import short_of_tolerance


def reference_command(
    xi: Optional[str] = typer.Option(
        None, "--xi", help="Mixture as q:w pairs, xi(x) = sum w x^q. SK with i<j pairs: 2:0.5; pure 3-spin: 3:1."
    ),
    gs_tol: float = typer.Option(1e-4, "--gs-tol", help="Stop adding steps to gamma when the ground state moves by less than this."),
    alg_tol: float = typer.Option(1e-3, "--alg-tol", help="Same for the algorithmic threshold."),
    max_steps: int = typer.Option(10, "--max-steps", help="Largest number k of steps of gamma tried."),
    no_cache: bool = typer.Option(False, "--no-cache", help="Compute afresh and do not write the cache."),
    cache_dir: Optional[Path] = typer.Option(
        None, "--cache-dir", help="Cache directory (default $LEADLINE_CACHE_DIR, else $XDG_CACHE_HOME/leadline or ~/.cache/leadline)."
    ),
    store: Optional[Path] = typer.Option(
        None,
        "--store",
        help="A study store: compute GS and ALG for each of its dense ensembles (or only --ensemble) and cache "
        "them in the store, where `leadline table` and `plot` find them. Takes the store's writer lock.",
    ),
    ensemble: Optional[str] = typer.Option(None, "--ensemble", help="With --store: only this ensemble label."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of a report."),
) -> None:
    """Ground-state energy density (GS) and algorithmic threshold (ALG) of a mixture.

    GS is max H/n (Auffinger-Chen formula); ALG is the energy reached by the best
    known polynomial-time algorithms, incremental AMP (El Alaoui-Montanari-Sellke).
    Both are maximum energy densities in the normalization E[H H'] = n xi(R).

    Example (SK model, GS = 0.763166):

        leadline reference --xi 2:0.5
    """
    if store is not None:
        if xi is not None:
            raise InputError("give either --xi or --store, not both")
        check_reference_settings(gs_tol, alg_tol, max_steps)
        _store_references(store, ensemble, gs_tol, alg_tol, max_steps, as_json)
        return
    if ensemble is not None:
        raise InputError("--ensemble goes with --store")
    mix = mixture_arg(xi)
    check_reference_settings(gs_tol, alg_tol, max_steps)
    directory = None
    if not no_cache:
        directory = cache_dir if cache_dir is not None else reference_cache.default_cache_dir()
        if directory.exists() and not directory.is_dir():
            raise InputError(f"--cache-dir {directory} exists and is not a directory; give a directory or --no-cache")
    key = reference_cache.cache_key(mix.spec(), gs_tol, alg_tol, max_steps)
    refs = reference_cache.load(directory, key) if directory is not None else None
    cached = refs is not None
    if refs is None:
        refs = _computed(mix, gs_tol, alg_tol, max_steps)
        if directory is not None:
            try:
                reference_cache.store(directory, key, refs)
            except OSError as exc:
                print(f"leadline: warning: could not write the cache in {directory}: {exc}", file=sys.stderr)
    if as_json:
        out = refs.to_json()
        out["cached"] = cached
        typer.echo(json.dumps(out))
        return
    typer.echo(report(mix, refs, cached))


def _computed(mix, gs_tol: float, alg_tol: float, max_steps: int, where: str = ""):
    """reference_energies, with a result that cannot be GS/ALG turned into one line (InputError)."""
    from leadline.kernels.reference import ReferenceRangeError, reference_energies

    try:
        return reference_energies(mix, gs_tol=gs_tol, alg_tol=alg_tol, max_steps=max_steps)
    except ReferenceRangeError as exc:
        raise InputError(f"{where}{exc}") from None


def _store_references(path: Path, only: str | None, gs_tol: float, alg_tol: float, max_steps: int, as_json: bool) -> None:
    """Compute and cache GS/ALG in a study store (one writer at a time: takes the lock)."""
    from leadline.kernels.mixture import parse_mixture
    from leadline.storage import StoreError, StudyStore, open_study

    try:
        reader = open_study(path)
    except StoreError as exc:
        raise InputError(str(exc)) from None
    labels = reader.ensembles()
    if only is not None and only not in labels:
        raise InputError(f"--ensemble {only!r} is not in the study (have {', '.join(labels)})")
    chosen = [lab for lab in labels if (only is None or lab == only) and reader.ensemble(lab).get("xi")]
    if not chosen:
        raise InputError("no dense ensemble (with a mixture xi) to compute references for")
    try:
        writer = StudyStore.open(path, command="reference")
    except StoreError as exc:
        raise InputError(str(exc)) from None
    results = {}
    with writer:
        for label in chosen:  # all computed (and checked) before the first is saved
            mix = parse_mixture(reader.ensemble(label)["xi"])
            results[label] = (mix, _computed(mix, gs_tol, alg_tol, max_steps, f"ensemble {label!r}: "))
        for label, (mix, refs) in results.items():
            writer.save_references(label, refs.to_json())
            if not as_json:
                typer.echo(f"[{label}]")
                typer.echo(report(mix, refs, False))
    if as_json:
        typer.echo(json.dumps({label: r.to_json() for label, (_, r) in results.items()}))


def report(mix, refs, cached: bool) -> str:
    gs_d = refs.details.get("ground_state", {})
    short = short_of_tolerance(refs)
    lines = [
        f"xi(x)                  = {mix.label()}",
        f"ground state GS        = {fmt(refs.ground_state)} +- {refs.ground_state_uncertainty:.1e}"
        f"   (k = {len(refs.ground_state_k_sequence)} steps, best bound {fmt(gs_d.get('best_bound', float('nan')))})",
        *([f"                         {short['ground_state']}"] if "ground_state" in short else []),
        f"algorithmic threshold  = {fmt(refs.algorithmic_threshold)} +- {refs.algorithmic_threshold_uncertainty:.1e}"
        f"   (k = {len(refs.algorithmic_threshold_k_sequence)} steps)",
        *([f"                         {short['algorithmic_threshold']}"] if "algorithmic_threshold" in short else []),
        "overlap gap            = "
        + ("yes: ALG < GS beyond the uncertainties" if refs.overlap_gap else "not detected (ALG = GS within the uncertainties)"),
        f"energies are max H/n with E[H H'] = n xi(R); {'from the cache' if cached else f'{refs.wall_time:.1f} s'}",
    ]
    return "\n".join(lines)


def register(app: typer.Typer) -> None:
    app.command("reference")(reference_command)
