"""Plot the bath engine's bond growth with p at a fixed cut-off (docs/bath-growth.png).

Reads the "growth" rows that ``bench_bath.py --section growth --json FILE`` wrote (largest bond
and CPU seconds of one run per mixture and depth; several files: their rows together, a later
file's row replacing an earlier one's for the same mixture and depth) and draws the largest bond against p on
log-log axes, one curve per mixture, with the CPU seconds in a second panel.

Usage:  python benchmarks/plot_bath_growth.py RESULTS.json [MORE.json ...] [--output docs/bath-growth.png]
"""

from __future__ import annotations

import argparse
import json
import os

LABELS = {"sk": "SK (2:0.5)", "q3": "pure q = 3", "q4": "pure q = 4", "mix24": "2:0.5,4:0.5"}


def plot(rows: list, out: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.ticker import FormatStrFormatter

    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(10, 4))
    cutoffs = sorted({r["cutoff"] for r in rows})
    for name in LABELS:
        pts = sorted((r["p"], r["largest_bond"], r["seconds"]) for r in rows if r["name"] == name)
        if not pts:
            continue
        ps, bonds, secs = zip(*pts)
        ax1.plot(ps, bonds, "o-", label=LABELS[name])
        ax2.plot(ps, secs, "o-", label=LABELS[name])
    for ax in (ax1, ax2):
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel("depth p")
        ax.set_xticks([p for p in (8, 16, 24, 32, 40, 48, 56, 64) if p <= max(r["p"] for r in rows)])
        ax.xaxis.set_major_formatter(FormatStrFormatter("%d"))
        ax.xaxis.set_minor_formatter(FormatStrFormatter(""))
        ax.grid(True, which="both", alpha=0.3)
    ax1.set_yticks([16, 32, 64, 128, 256, 512])
    ax1.yaxis.set_major_formatter(FormatStrFormatter("%d"))
    ax1.yaxis.set_minor_formatter(FormatStrFormatter(""))
    ax1.set_ylabel("largest bond dimension")
    ax2.set_ylabel("CPU seconds of one run (one BLAS thread)")
    ax1.set_title(f"bond at cut-off {', '.join(f'{c:g}' for c in cutoffs)}")
    ax2.set_title("cost of one run")
    ax1.legend()
    fig.tight_layout()
    fig.savefig(out, dpi=90)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("results", nargs="+")
    ap.add_argument("--output", default=os.path.join(os.path.dirname(__file__), os.pardir, "docs", "bath-growth.png"))
    args = ap.parse_args(argv)
    rows = {}
    for path in args.results:
        with open(path) as fh:
            for r in json.load(fh)["growth"]:
                if "largest_bond" in r:  # not the breakdown rows
                    rows[(r["name"], r["p"])] = r
    plot(list(rows.values()), args.output)
    print(f"wrote {args.output}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
