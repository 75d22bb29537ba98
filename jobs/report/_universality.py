"""The universality view: sparse Max-q-XORSAT values next to the dense q-spin V_p*.

For a sparse ensemble (q, D) with optimal satisfied fraction nu_p*, the scaled value

    s_p(D) = sqrt(D) (nu_p* - 1/2) * 2 / sqrt(q)

tends to the dense V_p* of the pure q-spin model xi = x^q as D -> infinity
(Basso, Gamarnik, Mei, Zhou, FOCS 2022, arXiv:2204.10306).  This module lines
them up per depth so the approach to the dense limit is visible.
"""

from __future__ import annotations

from typing import Sequence

from leadline.kernels.mixture import parse_mixture
from leadline.kernels.sparse import scaled_value

__all__ = ["universality_views", "render_universality_markdown"]


def universality_views(reports: Sequence) -> list[dict]:
    """One view per q that has sparse ensembles in the study.

    ``reports`` are EnsembleReport objects (``_model``) with ``kind``, ``q``,
    ``degree``, ``xi`` and ``rows``.  Returns a list of dicts
    {"q", "dense_label" (or None), "degrees": [...], "rows": [{"p", "dense", "sparse":
    [{"label", "degree", "nu", "scaled", "difference"}]}]}; "difference" is
    scaled - dense V_p* (None when the dense ensemble has no value at that depth).
    """
    views = []
    qs = sorted({r.q for r in reports if r.kind == "sparse" and r.q is not None})
    for q in qs:
        pure = parse_mixture(f"{q}:1")
        dense = next(
            (r for r in reports if r.kind == "dense" and r.xi and parse_mixture(r.xi) == pure), None
        )
        sparse = sorted((r for r in reports if r.kind == "sparse" and r.q == q), key=lambda r: r.degree)
        dense_values = {row.p: row.value for row in dense.rows} if dense else {}
        depths = sorted({row.p for r in sparse for row in r.rows} | set(dense_values))
        rows = []
        for p in depths:
            entries = []
            for r in sparse:
                nu = next((row.value for row in r.rows if row.p == p), None)
                s = scaled_value(q, r.degree, nu) if nu is not None else None
                v = dense_values.get(p)
                entries.append(
                    {
                        "label": r.label,
                        "degree": r.degree,
                        "nu": nu,
                        "scaled": s,
                        "difference": (s - v) if (s is not None and v is not None) else None,
                    }
                )
            rows.append({"p": p, "dense": dense_values.get(p), "sparse": entries})
        views.append(
            {
                "q": q,
                "dense_label": dense.label if dense else None,
                "degrees": [r.degree for r in sparse],
                "rows": rows,
            }
        )
    return views


def _f(x, spec):
    return "-" if x is None else format(x, spec)


def render_universality_markdown(views: Sequence[dict]) -> list[str]:
    out = []
    for view in views:
        q = view["q"]
        out.append(f"## Universality, q = {q}: sparse Max-{q}-XORSAT against the dense pure {q}-spin model")
        out.append("")
        out.append(
            f"scaled = sqrt(D) (nu_p* - 1/2) 2/sqrt({q}) tends to V_p* of xi = x^{q} as D -> infinity; "
            "diff = scaled - V_p* (Basso, Gamarnik, Mei, Zhou, FOCS 2022)."
        )
        if view["dense_label"] is None:
            out.append(f"(no dense ensemble with xi = x^{q} in this study: add one to see the differences)")
        out.append("")
        header = ["p", f"V_p* x^{q}"]
        for D in view["degrees"]:
            header += [f"D={D:g} nu*", f"D={D:g} scaled", f"D={D:g} diff"]
        out.append("| " + " | ".join(header) + " |")
        out.append("|" + "|".join("--:" for _ in header) + "|")
        for row in view["rows"]:
            cells = [str(row["p"]), _f(row["dense"], ".6f")]
            for e in row["sparse"]:
                cells += [_f(e["nu"], ".6f"), _f(e["scaled"], ".6f"), _f(e["difference"], "+.1e")]
            out.append("| " + " | ".join(cells) + " |")
        out.append("")
    return out
