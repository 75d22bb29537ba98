"""The table of the SK study to p = 16, rebuilt from its stored values (tests/sk_optima.csv).

Run from the repository root: ``python tests/sk_ladder_report.py`` prints the depth table, the
headline (README.md); ``--full`` prints the whole table as
`leadline table` prints it for the store (docs/performance.md). The same report code as
`leadline table`; the ground state is the shipped Parisi value (a cache of `leadline reference`
runs is not read).
"""

from __future__ import annotations

import csv
import sys
from pathlib import Path

from leadline.jobs.report import InMemoryStudy, build_report, render_markdown
from leadline.tests.extrapolation_calibration import SK_LADDER


def sk_ladder_markdown() -> str:
    lines = [ln for ln in Path(SK_LADDER).read_text().splitlines() if ln.strip() and not ln.startswith("#")]
    depths = [{"p": int(r["p"]), "value": float(r["value"]), "gradient_norm": float(r["gradient_norm"])}
              for r in csv.DictReader(lines)]
    study = InMemoryStudy("sk p = 1..16", [({"label": "sk", "kind": "dense", "xi": "2:0.5"}, depths)])
    return render_markdown(build_report(study))


def summary(text: str) -> str:
    """The depth table and the V_inf headline lines."""
    def block(start: str) -> str:
        i = text.index(start)
        return text[i:text.index("\n\n", i)]

    headline = [ln for ln in text.splitlines() if ln.startswith("V_inf")]
    return "\n".join([block("|  p |"), "", *headline])


if __name__ == "__main__":
    text = sk_ladder_markdown()
    print(text if "--full" in sys.argv[1:] else summary(text), end="" if "--full" in sys.argv[1:] else "\n")
