"""Calibration of the extrapolation range on the stored SK ladder (docs/extrapolation.md).

From the SK optima p <= k (k = 6..12) of tests/sk_optima.csv, the extrapolation predicts V_p at
the later computed depths k+1..16 (`--at-depth`) and V_inf; the range printed at k should contain
every later value and the Parisi value 0.763166 (Crisanti & Rizzo, Phys. Rev. E 65, 046137 (2002)),
to which V_p* is conjectured to converge (Basso, Farhi, Marwaha, Villalonga, Zhou, TQC 2022,
arXiv:2110.14206). The values at p = 1..16 are this tool's own exact optima; their published
source for SK is the table of Basso et al. The docs paste :func:`render_calibration`;
tests/test_extrapolate.py re-runs it.

The deep ladder (:func:`load_deep_ladder`, :func:`calibrate_deep`) adds this tool's SK sweep to
p = 33 (tests/sk_deep_optima.csv: exact to 16, bosonic bath beyond, with the engine's error
estimates): from p <= k, k = 12..32, the range should contain every later value to p = 33 and the
Parisi value. tests/test_extrapolate_deep.py re-runs it; docs/extrapolation.md pastes
:func:`render_deep_calibration`.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

from leadline.kernels.extrapolate import BACKTEST_GROWTH, MIN_DEPTHS, extrapolate
from leadline.kernels.mixture import parse_mixture
from leadline.kernels.reference import lookup_ground_state, union_bound

SK_LADDER = Path(__file__).with_name("sk_optima.csv")
SK_DEEP_LADDER = Path(__file__).with_name("sk_deep_optima.csv")
Q3_DEEP_LADDER = Path(__file__).with_name("q3_deep_optima.csv")
DEEP_K_RANGE = range(12, 34)
Q3_K_RANGE = range(12, 25)
PARISI = 0.763166  # Crisanti & Rizzo, Phys. Rev. E 65, 046137 (2002); shipped with +- 1e-6
PARISI_UNCERTAINTY = 1e-6
K_RANGE = range(6, 13)


def load_ladder(path: Path = SK_LADDER) -> dict[int, float]:
    """{p: V_p*} of a stored ladder CSV (comment lines start with #)."""
    lines = [ln for ln in path.read_text().splitlines() if ln.strip() and not ln.startswith("#")]
    return {int(r["p"]): float(r["value"]) for r in csv.DictReader(lines)}


def load_deep_ladder(name: str = "sk") -> tuple[dict[int, float], dict[int, float | None]]:
    """({p: V_p*}, {p: estimate or None}) of a deep ladder. "sk": p = 1..33, tests/sk_optima.csv for
    p <= 12 (full precision) and tests/sk_deep_optima.csv beyond (12 decimals; bath depths with
    the engine's error estimate); "q3": the pure 3-spin ladder p = 1..24 of tests/q3_deep_optima.csv."""
    if name == "sk":
        values = {p: v for p, v in load_ladder().items() if p <= 12}
        path = SK_DEEP_LADDER
    elif name == "q3":
        values, path = {}, Q3_DEEP_LADDER
    else:
        raise ValueError(f"unknown ladder {name!r} (sk or q3)")
    estimates: dict[int, float | None] = {p: None for p in values}
    lines = [ln for ln in path.read_text().splitlines() if ln.strip() and not ln.startswith("#")]
    for r in csv.DictReader(lines):
        p = int(r["p"])
        values[p] = float(r["value"])
        estimates[p] = float(r["estimate"]) if r["estimate"] else None
    return values, estimates


@dataclass(frozen=True)
class CalibrationRow:
    k: int
    declined: str | None  # why the table gives no headline at k (None: it gives one)
    limit: tuple[float, float, float]  # central, low, high of V_inf (computed even when declined)
    later: dict  # {p: (central, low, high)} at p = k+1..pmax
    truth: dict  # {p: V_p*}
    beyond: dict = None  # {p: (central, low, high)} at requested depths past the ladder (extra_depths)
    ground_state: float = PARISI  # the GS whose containment is checked (SK: the Parisi value)

    @property
    def later_contained(self) -> int:
        return sum(lo <= self.truth[p] <= hi for p, (_, lo, hi) in self.later.items())

    @property
    def parisi_contained(self) -> bool:
        """The ground state (for SK the Parisi value) is inside the V_inf range."""
        return self.limit[1] <= self.ground_state <= self.limit[2]

    @property
    def worst_margin(self) -> float:
        """Smallest distance of a later value to the nearer end of its range, over the range's width."""
        return min(min(self.truth[p] - lo, hi - self.truth[p]) / (hi - lo) for p, (_, lo, hi) in self.later.items())

    @property
    def width(self) -> float:
        return self.limit[2] - self.limit[1]


def calibrate(ladder: dict[int, float] | None = None, ks=K_RANGE,
              back_test_growth: float = BACKTEST_GROWTH, estimates: dict | None = None,
              scale_windows: bool = True, extra_depths=(), mixture: str = "2:0.5",
              ground_state: float = PARISI, ground_state_uncertainty: float = PARISI_UNCERTAINTY) -> list[CalibrationRow]:
    """For each k: the extrapolation of p <= k as `leadline table --at-depth k+1..pmax` forms it.

    The table declines below MIN_DEPTHS depths; the range it would print is computed anyway
    (``min_depths=0``) so that the calibration shows it.
    """
    ladder = load_ladder() if ladder is None else ladder
    pmax = max(ladder)
    bound = union_bound(parse_mixture(mixture))
    out = []
    for k in ks:
        depths = [p for p in sorted(ladder) if p <= k]
        values = [ladder[p] for p in depths]
        later = list(range(k + 1, pmax + 1))
        kwargs = dict(ground_state=ground_state, ground_state_uncertainty=ground_state_uncertainty, upper_bound=bound,
                      at_depths=[*later, *extra_depths], target_ratios=(), back_test_growth=back_test_growth,
                      scale_windows=scale_windows,
                      uncertainties=None if estimates is None else [estimates.get(p) for p in depths])
        table = extrapolate(depths, values, **kwargs)
        forced = table if table.declined is None else extrapolate(depths, values, min_depths=0, **kwargs)
        lim = forced.limit
        out.append(CalibrationRow(
            k, table.declined, (lim.central, lim.low, lim.high),
            {p: (e.central, e.low, e.high) for p, e in forced.at_depth.items() if p in later},
            {p: ladder[p] for p in later},
            {p: (e.central, e.low, e.high) for p, e in forced.at_depth.items() if p not in later},
            ground_state,
        ))
    return out


def render_calibration(rows: list[CalibrationRow]) -> str:
    """The calibration table of docs/extrapolation.md."""
    header = ["k", "table at k", "V_inf", "V_inf range", "Parisi in range", "V_16 range", "V_16*",
              "later depths in range", "worst margin"]
    body = []
    for r in rows:
        _, lo16, hi16 = r.later[16]
        body.append([
            str(r.k), "headline" if r.declined is None else f"declines (< {MIN_DEPTHS} depths)",
            f"{r.limit[0]:.4f}", f"{r.limit[1]:.4f} .. {r.limit[2]:.4f}", "yes" if r.parisi_contained else "NO",
            f"{lo16:.5f} .. {hi16:.5f}", f"{r.truth[16]:.5f}", f"{r.later_contained} of {len(r.later)}",
            f"{r.worst_margin:.2f}",
        ])
    widths = [max(len(h), *(len(b[i]) for b in body)) for i, h in enumerate(header)]
    right = {0, 2, 6, 7, 8}

    def line(cells):
        return "| " + " | ".join(c.rjust(w) if i in right else c.ljust(w)
                                 for i, (c, w) in enumerate(zip(cells, widths))) + " |"

    rule = "|" + "|".join("-" * (w + 1) + ":" if i in right else "-" * (w + 2) for i, w in enumerate(widths)) + "|"
    return "\n".join([line(header), rule, *(line(b) for b in body)])


def render_growth_scan(growths=(0.25, 0.35, 0.4, 0.5, 0.75, 1.0)) -> str:
    """How the choice of BACKTEST_GROWTH decides containment and width (docs/extrapolation.md)."""
    lines = ["| growth | every later V_p* and Parisi in range (k = 6..12) | worst margin | V_inf width at k = 8 | V_16 width at k = 8 |",
             "|-------:|--------------------------------------------------|-------------:|---------------------:|--------------------:|"]
    for g in growths:
        rows = calibrate(back_test_growth=g)
        ok = all(r.later_contained == len(r.later) and r.parisi_contained for r in rows)
        worst = min(r.worst_margin for r in rows)
        r8 = next(r for r in rows if r.k == 8)
        lines.append(f"| {g:6.2f} | {'yes' if ok else 'no':<48} | {worst:12.2f} | {r8.limit[2] - r8.limit[1]:20.4f} | "
                     f"{r8.later[16][2] - r8.later[16][1]:19.4f} |")
    return "\n".join(lines)


def calibrate_deep(ks=None, scale_windows: bool = True, ladder: str = "sk") -> list[CalibrationRow]:
    """:func:`calibrate` on a deep ladder (:func:`load_deep_ladder`) with its bath depths' estimates,
    also at p = 160. SK: k = 12..33 against the Parisi value. q3: k = 12..24 against the shipped
    pure 3-spin ground state 1.15 +- 0.002 (a value from memory, see kernels/reference)."""
    values, estimates = load_deep_ladder(ladder)
    if ladder == "sk":
        return calibrate(values, DEEP_K_RANGE if ks is None else ks, estimates=estimates,
                         scale_windows=scale_windows, extra_depths=(160,))
    match = lookup_ground_state(parse_mixture("3:1"))
    return calibrate(values, Q3_K_RANGE if ks is None else ks, estimates=estimates, scale_windows=scale_windows,
                     extra_depths=(160,), mixture="3:1", ground_state=match.ground_state,
                     ground_state_uncertainty=match.uncertainty)


def render_deep_calibration(rows: list[CalibrationRow], fixed: list[CalibrationRow] | None = None) -> str:
    """The deep-ladder table of docs/extrapolation.md (with ``fixed``: the earlier rule's width beside)."""
    lines = ["|  k |  V_inf | V_inf range      |  width |   GS in range   | later depths in range | worst margin "
             "| V_160/GS range   |" + (" width, fixed windows |" if fixed else ""),
             "|---:|-------:|------------------|-------:|-----------------|----------------------:|-------------:"
             "|------------------|" + ("---------------------:|" if fixed else "")]
    by_k = {r.k: r for r in fixed or ()}
    for r in rows:
        _, lo, hi = r.beyond[160]
        margin = f"{r.worst_margin:12.2f}" if r.later else " " * 12
        line = (f"| {r.k:2d} | {r.limit[0]:.4f} | {r.limit[1]:.4f} .. {r.limit[2]:.4f} | {r.width:.4f} | "
                f"{'yes' if r.parisi_contained else 'NO':<15} | {f'{r.later_contained} of {len(r.later)}':>21} | {margin} "
                f"| {lo / r.ground_state:.4f} .. {hi / r.ground_state:.4f} |")
        if fixed:
            line += f" {by_k[r.k].width:20.4f} |"
        lines.append(line)
    return "\n".join(lines)
