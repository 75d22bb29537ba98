"""The universality view of the table: sparse Max-q-XORSAT scaled next to the dense q-spin V_p*.

Source of the limit: Basso, Gamarnik, Mei, Zhou, FOCS 2022 (arXiv:2204.10306):
sqrt(D) (nu_p* - 1/2) * 2/sqrt(q) -> V_p* of xi = x^q as D -> infinity.
"""

from __future__ import annotations

import csv
import io
import json

import pytest

from leadline.jobs.report import InMemoryStudy, build_report, render_csv, render_json, render_markdown
from leadline.kernels.mixture import parse_mixture
from leadline.kernels.optimize import optimize_depth
from leadline.kernels.sparse import optimize_sparse


@pytest.fixture(scope="module")
def study():
    dense, sparse_small, sparse_large = [], [], []
    prev = prev_v = None
    for p in (1, 2):
        r = optimize_depth(parse_mixture("3:1"), p, previous=prev, previous_value=prev_v, restarts=1)
        dense.append({"p": p, "value": r.value, "gamma": list(r.gamma), "beta": list(r.beta), "gradient_norm": r.gradient_norm})
        prev, prev_v = (r.gamma, r.beta), r.value
    for D, out in ((4, sparse_small), (10_000, sparse_large)):
        prev = prev_v = None
        for p in (1, 2):
            r = optimize_sparse(3, D, p, previous=prev, previous_value=prev_v, restarts=1)
            out.append({"p": p, "value": r.value, "gamma": list(r.gamma), "beta": list(r.beta), "gradient_norm": r.gradient_norm})
            prev, prev_v = (r.gamma, r.beta), r.value
    meta = lambda label, **kw: {"label": label, "kind": "dense", "xi": None, "q": None, "degree": None, "reference": {}, **kw}
    return InMemoryStudy(
        "universality",
        [
            (meta("pure3", xi="3:1"), dense),
            (meta("d4", kind="sparse", q=3, degree=4), sparse_small),
            (meta("d1e4", kind="sparse", q=3, degree=10_000), sparse_large),
        ],
    )


def test_view_lines_up_depths_and_approaches_the_dense_limit(study):
    report = build_report(study)
    (view,) = report.universality
    assert view["q"] == 3 and view["dense_label"] == "pure3" and view["degrees"] == [4.0, 10000.0]
    for row in view["rows"]:
        small, large = row["sparse"]
        # the scaled optimum approaches the dense one like c/D (c ~ 0.1 measured): at D = 1e4 within 1e-4
        assert abs(large["difference"]) < 1e-4
        assert abs(small["difference"]) > 10 * abs(large["difference"])


def test_view_in_every_format(study):
    report = build_report(study)
    md = render_markdown(report)
    assert "## Universality, q = 3" in md and "D=10000 diff" in md
    rows = [r for r in csv.DictReader(io.StringIO(render_csv(report))) if r["record"] == "universality"]
    assert len(rows) == 4 and {r["ensemble"] for r in rows} == {"d4", "d1e4"}
    data = json.loads(render_json(report))
    assert data["universality"][0]["rows"][0]["p"] == 1
