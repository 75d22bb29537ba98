"""Tables and plots from a small real study store.

The store is written by a real in-process sweep (SK model and one mixture
without a shipped ground state, p = 1..3); the table must show
exactly the stored values, every format must parse, the figures must open
with the documented size, and the SK numbers must agree with the published
ones.
"""

from __future__ import annotations

import csv
import io
import json
import math

import numpy as np
import pytest

from leadline.jobs.cli import main
from leadline.jobs.report import (
    CSV_COLUMNS,
    FIGURE_DPI,
    FIGURE_SIZE_INCHES,
    InMemoryStudy,
    angle_plot_path,
    build_report,
    render_csv,
    render_json,
    render_markdown,
    write_plots,
)
from leadline.kernels.mixture import parse_mixture
from leadline.storage import open_study

# Farhi, Goldstone, Gutmann, Zhou, "The Quantum Approximate Optimization Algorithm and the
# Sherrington-Kirkpatrick Model at Infinite Size", Quantum 6, 759 (2022), Table 1 (4 decimals).
SK_PUBLISHED = {1: 0.3033, 2: 0.4075, 3: 0.4726, 4: 0.5157, 5: 0.5476, 6: 0.5721, 7: 0.5915, 8: 0.6073}
# Crisanti, Rizzo, Phys. Rev. E 65, 046137 (2002): Parisi ground-state energy of SK, xi = x^2/2.
SK_PARISI = 0.763166

SPEC = """
[study]
name = "report-test"
store = "study.zarr"

[depths]
pmax = 3

[optimizer]
restarts = 1

[compute]
executor = "inprocess"

[[ensemble]]
label = "sk"
xi = "2:0.5"

[[ensemble]]
label = "mix24"
xi = "2:0.5,4:0.25"
"""


def _write_study(folder):
    """A real store written by a real sweep (in-process executor, SK and a mixture, p = 1..3)."""
    spec = folder / "study.toml"
    spec.write_text(SPEC)
    main(["sweep", str(spec), "--quiet"])
    return folder / "study.zarr"


@pytest.fixture(scope="module")
def store_path(tmp_path_factory):
    return _write_study(tmp_path_factory.mktemp("report"))


@pytest.fixture(scope="module")
def study(store_path):
    return open_study(store_path)


@pytest.fixture(scope="module")
def report(study):
    return build_report(study)


def test_stored_sk_values_match_the_published_table(study):
    depths = study.depths("sk")
    assert [d["p"] for d in depths] == [1, 2, 3]
    for d in depths:
        # Farhi et al., Quantum 6, 759 (2022), Table 1, quoted to 4 decimals
        assert d["value"] == pytest.approx(SK_PUBLISHED[d["p"]], abs=6e-5)
    # p = 1 closed form 1/sqrt(4e) (Farhi et al. 2022, eq. for p = 1)
    assert depths[0]["value"] == pytest.approx(1 / math.sqrt(4 * math.e), abs=1e-9)


def test_report_rows_equal_the_stored_values(study, report):
    for ens in report.ensembles:
        stored = study.depths(ens.label)
        assert [r.p for r in ens.rows] == [d["p"] for d in stored]
        for row, d in zip(ens.rows, stored):
            assert row.value == d["value"]
            assert row.gradient_norm == d["gradient_norm"]
            assert list(row.gamma) == d["gamma"] and list(row.beta) == d["beta"]
        for a, b in zip(ens.rows, ens.rows[1:]):
            assert b.gain == b.value - a.value
            assert b.value >= a.value - 1e-12  # depth p can emulate depth p-1 (common practice)


def test_sk_reference_is_the_parisi_value_and_bounds_every_depth(report):
    sk = report.ensembles[0]
    assert sk.references.ground_state == pytest.approx(SK_PARISI, abs=1e-9)
    assert sk.references.ground_state_origin == "shipped table"
    for row in sk.rows:
        assert row.value < sk.references.ground_state
        assert row.ratio_gs == row.value / sk.references.ground_state
    mix = report.ensembles[1]
    assert mix.references.ground_state is None
    assert all(r.ratio_gs is None for r in mix.rows)
    assert any("no reference ground-state energy" in n for n in mix.notes)


def test_markdown_lists_values_ratios_fits_and_the_caveat(study, report):
    text = render_markdown(report)
    for d in study.depths("sk"):
        assert f"{d['value']:.6f}" in text
        assert f"{d['value'] / SK_PARISI:.4f}" in text
    assert "V_p*/GS" in text and "Crisanti" in text
    assert "estimates" in text and "not bounds" in text
    # three depths leave nothing to hold out for a back-test: fits are listed, no headline
    assert "Back-test: too few depths" in text and "No headline" in text
    assert "no back-test" in text
    mix_section = text.split("## mix24")[1]
    assert "V_p*/GS" not in mix_section.split("Note:")[0]


def test_same_store_gives_the_same_extrapolation_numbers(store_path, report):
    """Back-test errors and every extrapolated number are reproducible from the store."""
    again = build_report(open_study(store_path))
    assert render_json(again) == render_json(report)
    assert render_csv(again) == render_csv(report)


def test_csv_parses_and_holds_the_stored_values(study, report):
    rows = list(csv.DictReader(io.StringIO(render_csv(report))))
    assert rows and list(rows[0]) == CSV_COLUMNS
    for label in study.ensembles():
        depth_rows = [r for r in rows if r["ensemble"] == label and r["record"] == "depth"]
        stored = study.depths(label)
        assert [int(r["p"]) for r in depth_rows] == [d["p"] for d in stored]
        for r, d in zip(depth_rows, stored):
            assert float(r["value"]) == d["value"]  # full precision round trip
            assert float(r["gradient_norm"]) == d["gradient_norm"]
            assert float(r["inv_p"]) == 1.0 / d["p"]
    sk_ref = [r for r in rows if r["ensemble"] == "sk" and r["record"] == "reference"]
    assert float(sk_ref[0]["value"]) == pytest.approx(SK_PARISI)
    fits = [r for r in rows if r["ensemble"] == "sk" and r["record"] == "fit"]
    assert fits and {r["status"] for r in fits} == {"no back-test"}
    assert not [r for r in rows if r["record"] == "extrapolation"]  # no headline from 3 depths
    assert any("not a bound" in r["note"] or "not bounds" in r["note"] for r in rows)
    assert not [r for r in rows if r["ensemble"] == "mix24" and r["ratio_gs"]]


def test_json_is_one_object_with_the_stored_values(study, report):
    obj = json.loads(render_json(report))
    assert obj["format"] == "leadline.table" and obj["format_version"] == 4
    assert [e["label"] for e in obj["ensembles"]] == study.ensembles()
    for ens in obj["ensembles"]:
        stored = study.depths(ens["label"])
        assert [d["value"] for d in ens["depths"]] == [d["value"] for d in stored]
    assert "not bounds" in obj["note"]
    sk = obj["ensembles"][0]
    assert sk["extrapolation"]["fits"][0]["family"] == "linear-in-1/p"
    assert sk["extrapolation"]["v_inf"] is None and "not a confidence interval" in sk["extrapolation"]["spread_meaning"]


@pytest.fixture()
def drawn(monkeypatch):
    """The matplotlib figures written by write_plots, captured as they are saved (in order)."""
    from matplotlib.figure import Figure

    figures = []
    save = Figure.savefig

    def recording_savefig(fig, *args, **kwargs):
        figures.append(fig)
        return save(fig, *args, **kwargs)

    monkeypatch.setattr(Figure, "savefig", recording_savefig)
    return figures


def _value_markers(ax):
    """The marker-only series of the value plot (one per dense ensemble): label -> (x, y)."""
    return {line.get_label().split(":")[0]: (list(line.get_xdata()), list(line.get_ydata()))
            for line in ax.get_lines() if line.get_linestyle() == "None" and line.get_marker() == "o"}


def check_figures(figures, study, report):
    """Axes, series count and plotted data of both figures against the stored values."""
    value_fig, angle_fig = figures
    (ax,) = [a for a in value_fig.axes if a.get_xlabel()]  # (the secondary depth axis has no data)
    assert ax.get_xlabel().startswith("1/p") and ax.get_ylabel().startswith("V_p*")
    dense = [e.label for e in report.ensembles if e.kind == "dense" and e.rows]
    markers = _value_markers(ax)
    assert sorted(markers) == sorted(dense)  # one series of stored values per dense ensemble
    for label in dense:
        stored = study.depths(label)
        assert markers[label][0] == [1.0 / d["p"] for d in stored]
        assert markers[label][1] == [d["value"] for d in stored]
    # the SK ground state line, dashed, at the Parisi value (Crisanti, Rizzo 2002)
    horizontal = [line for line in ax.get_lines() if line.get_linestyle() == "--" and len(set(line.get_ydata())) == 1]
    assert any(line.get_ydata()[0] == pytest.approx(SK_PARISI) for line in horizontal)
    # angle schedules: a row of (gamma, beta) panels per ensemble, one curve per finished depth
    assert len(angle_fig.axes) == 2 * len(report.ensembles)
    for row, ens in enumerate(report.ensembles):
        ax_g, ax_b = angle_fig.axes[2 * row], angle_fig.axes[2 * row + 1]
        stored = study.depths(ens.label)
        assert [list(line.get_ydata()) for line in ax_g.get_lines()] == [d["gamma"] for d in stored]
        assert [list(line.get_ydata()) for line in ax_b.get_lines()] == [d["beta"] for d in stored]


def test_plots_open_with_the_documented_size_and_show_the_stored_values(study, report, tmp_path, drawn):
    from matplotlib.image import imread

    out = tmp_path / "study.png"
    paths = write_plots(report, out)
    assert paths == [out, angle_plot_path(out)] and paths[1].name == "study-angles.png"
    main_img = imread(paths[0])
    w, h = FIGURE_SIZE_INCHES
    assert main_img.shape[:2] == (round(h * FIGURE_DPI), round(w * FIGURE_DPI))
    angles = imread(paths[1])
    assert angles.shape[:2] == (round(3.2 * FIGURE_DPI) * len(report.ensembles), 1000)
    check_figures(drawn, study, report)


# ----------------------------------------------------------- command line
def test_table_command_formats(store_path, tmp_path, capsys):
    main(["table", str(store_path)])
    out = capsys.readouterr().out
    assert "## sk" in out and "not bounds" in out
    target = tmp_path / "t.csv"
    main(["table", str(store_path), "--format", "csv", "--output", str(target)])
    rows = list(csv.DictReader(target.open()))
    assert {r["ensemble"] for r in rows} >= {"sk", "mix24"}
    main(["table", str(store_path), "--format", "json"])
    assert json.loads(capsys.readouterr().out)["study"] == "report-test"


def test_ground_state_override_wins(store_path, capsys):
    main(["table", str(store_path), "--format", "json", "--ground-state", "mix24=0.9"])
    obj = json.loads(capsys.readouterr().out)
    mix = obj["ensembles"][1]
    assert mix["references"]["ground_state"] == 0.9
    assert mix["references"]["ground_state_origin"] == "command line"
    assert mix["depths"][0]["ratio_gs"] == mix["depths"][0]["value"] / 0.9
    sk = obj["ensembles"][0]
    assert sk["references"]["ground_state_origin"] == "shipped table"


@pytest.mark.parametrize(
    "args, message",
    [
        (["table", "{store}", "--format", "xml"], "--format"),
        (["table", "{store}", "--at-depth", "50,x"], "--at-depth"),
        (["table", "{store}", "--at-depth", "0,100"], ">= 1"),
        (["table", "{store}", "--ground-state", "0.9"], "ambiguous"),
        (["table", "{store}", "--ground-state", "nosuch=0.9"], "no ensemble"),
        (["table", "{store}", "--ground-state", "sk=-1"], "positive"),
        (["table", "{tmp}/missing.zarr"], "does not exist"),
        (["table", "{tmp}", "--output", "{tmp}/out.txt"], "cannot read study store"),
        (["table", "{store}", "--output", "{tmp}/nodir/out.txt"], "does not exist"),
        (["plot", "{store}", "--output", "{tmp}/out.jpg"], ".png"),
        (["plot", "{store}"], "--output"),
    ],
)
def test_bad_input_exits_2_and_writes_nothing(store_path, tmp_path, capsys, args, message):
    args = [a.format(store=store_path, tmp=tmp_path) for a in args]
    before = sorted(p.name for p in tmp_path.iterdir())
    with pytest.raises(SystemExit) as exc:
        main(args)
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and message in err[0]
    assert sorted(p.name for p in tmp_path.iterdir()) == before


def test_plot_command(store_path, study, report, tmp_path, capsys, drawn):
    out = tmp_path / "fig.png"
    main(["plot", str(store_path), "--output", str(out)])
    assert capsys.readouterr().out.splitlines() == [f"wrote {out}", f"wrote {tmp_path / 'fig-angles.png'}"]
    check_figures(drawn, study, report)


INCOMPLETE_SPEC = """
[study]
name = "incomplete"
store = "inc.zarr"
[depths]
pmax = 2
[optimizer]
restarts = 0
[compute]
executor = "inprocess"
[[ensemble]]
label = "sk"
xi = "2:0.5"
[[ensemble]]
label = "mc"
kind = "sparse"
q = 2
degree = 3
"""


@pytest.fixture(scope="module")
def incomplete_store(tmp_path_factory):
    """A store whose sweep was killed (SIGKILL) as its last depth started: sk p = 1, 2 and
    mc p = 1 finished, mc p = 2 marked running."""
    import os
    import signal
    import subprocess
    import sys

    folder = tmp_path_factory.mktemp("incomplete")
    (folder / "study.toml").write_text(INCOMPLETE_SPEC)
    env = {**os.environ, "LEADLINE_CRASH_AT": "depth-started:4"}
    r = subprocess.run([sys.executable, "-m", "leadline", "sweep", str(folder / "study.toml"), "--quiet"],
                       env=env, capture_output=True, text=True, timeout=300)
    assert r.returncode == -signal.SIGKILL, r.stderr
    assert not open_study(folder / "inc.zarr").progress()["complete"]
    return folder / "inc.zarr"


def test_table_and_plot_of_an_incomplete_store_show_the_finished_depths(incomplete_store, tmp_path, capsys, drawn):
    study = open_study(incomplete_store)
    assert [d["p"] for d in study.depths("sk")] == [1, 2] and [d["p"] for d in study.depths("mc")] == [1]
    main(["table", str(incomplete_store), "--format", "json"])
    obj = json.loads(capsys.readouterr().out)
    sk, mc = obj["ensembles"]
    assert [d["p"] for d in sk["depths"]] == [1, 2] and [d["p"] for d in mc["depths"]] == [1]
    # Quantum 6, 759 (2022), Table 1; MaxCut p = 1: 1/2 + 1/(3 sqrt 3) (Wang, Hadfield, Jiang,
    # Rieffel, Phys. Rev. A 97, 022304 (2018))
    assert [d["value"] for d in sk["depths"]] == pytest.approx([SK_PUBLISHED[1], SK_PUBLISHED[2]], abs=6e-5)
    assert abs(mc["depths"][0]["value"] - (0.5 + 1 / (3 * math.sqrt(3)))) < 1e-6
    main(["table", str(incomplete_store)])
    text = capsys.readouterr().out
    assert "fewer than two finished depths: no extrapolation" in text.split("## mc")[1]
    out = tmp_path / "inc.png"
    main(["plot", str(incomplete_store), "--output", str(out)])
    check_figures(drawn, study, build_report(study))


# ------------------------------------------------- published numbers only
def test_rendering_of_the_published_sk_series_held_in_memory():
    """InMemoryStudy gives the same report path as a store: published values, no angles."""
    from leadline.kernels.extrapolate import extrapolate

    depths = [{"p": p, "value": v, "gamma": [], "beta": [], "gradient_norm": None} for p, v in SK_PUBLISHED.items()]
    study = InMemoryStudy("published", [({"label": "sk", "kind": "dense", "xi": "2:0.5", "reference": {}}, depths)])
    report = build_report(study, at_depths=(50, 160))
    rep = report.ensembles[0]
    assert [r.value for r in rep.rows] == list(SK_PUBLISHED.values())
    # QAOA energies are averages of H, so they never exceed the ground state (V_p <= GS)
    assert all(r.ratio_gs == r.value / SK_PARISI < 1 for r in rep.rows)
    refs = rep.references
    direct = extrapolate(list(SK_PUBLISHED), list(SK_PUBLISHED.values()), ground_state=SK_PARISI,
                         ground_state_uncertainty=refs.ground_state_uncertainty,
                         upper_bound=math.sqrt(math.log(2)), at_depths=(50, 160))
    assert json.dumps(rep.extrapolation.to_json()) == json.dumps(direct.to_json())
    assert rep.extrapolation.holdout == 2  # 8 depths: p = 7, 8 held out
    assert rep.extrapolation.limit is not None and rep.extrapolation.limit.high <= SK_PARISI + 1e-6
    assert [lv.name for lv in rep.extrapolation.levels] == ["ratio 0.95", "ratio 0.99"]
    text = render_markdown(report)
    assert "0.607300" in text and "0.7958" in text  # 0.6073 / 0.763166
    assert "V_inf estimate" in text and "Headline rule" in text and "not a confidence interval" in text
    assert "Predicted at given depths" in text and "| 160 |" in text and "ratio 0.99" in text
    rows = list(csv.DictReader(io.StringIO(render_csv(report))))
    kinds = {r["record"] for r in rows}
    assert {"fit", "back_test", "extrapolation", "at_depth", "depth_for"} <= kinds
    for r in rows:
        if r["record"] == "back_test":
            assert float(r["back_test_error"]) == pytest.approx(float(r["value"]) - SK_PUBLISHED[int(r["p"])], abs=1e-15)
    obj = json.loads(render_json(report))
    fits = obj["ensembles"][0]["extrapolation"]["fits"]
    assert all(f["back_test"]["held_out"] == [7, 8] for f in fits if f["back_test"])


# ------------------------------------------- computed GS / ALG (kernels.reference)
def _copy_with_references(store_path, folder, settings):
    """A copy of the study store with GS/ALG computed by kernels.reference recorded in it
    (what `leadline reference --store` does), at the given (coarse, quick) settings."""
    import shutil

    from leadline.kernels.reference import COARSE, reference_energies
    from leadline.storage import StudyStore

    copy = folder / "with-references.zarr"
    shutil.copytree(store_path, copy)
    with StudyStore.open(copy, command="reference") as writer:
        for label in open_study(copy).ensembles():
            xi = open_study(copy).ensemble(label)["xi"]
            writer.save_references(label, reference_energies(xi, discretization=COARSE, **settings).to_json())
    return copy


@pytest.mark.slow
def test_computed_references_fill_the_ratio_and_threshold_columns(store_path, tmp_path):
    """GS and ALG computed by kernels.reference and recorded in the store are used, and bound
    every depth; where the shipped ground state is more precise (SK), it wins and a note says so.

    Coarse settings keep this quick; their uncertainties are reported with the values.
    """
    copy = _copy_with_references(store_path, tmp_path, dict(gs_tol=1e-2, alg_tol=1e-2, max_steps=3))
    report = build_report(open_study(copy))
    for ens in report.ensembles:
        refs = ens.references
        assert refs.threshold_origin == "computed"
        # ALG <= GS: the threshold is an infimum over a larger class of gamma
        # (El Alaoui, Montanari, Sellke, Ann. Probab. 49 (2021))
        assert refs.threshold <= refs.ground_state + (refs.ground_state_uncertainty or 0.0) + 2e-3
        for row in ens.rows:
            # a QAOA energy is an average of H, never above its maximum
            assert row.value < refs.ground_state - refs.ground_state_uncertainty
            assert row.ratio_alg == row.value / refs.threshold
            assert row.exceeds_alg is False
    sk, mix = (e.references for e in report.ensembles)
    # Crisanti, Rizzo, Phys. Rev. E 65, 046137 (2002): 0.763166 +- 1e-6 beats a coarse computation
    assert sk.ground_state == SK_PARISI and sk.ground_state_origin == "shipped table"
    assert any("the store also holds a computed GS" in n and "shipped value is more precise" in n
               for n in report.ensembles[0].notes)
    # no shipped value for the mixture: the computed one is used, and labelled so
    assert mix.ground_state_origin == "computed"
    text = render_markdown(report)
    assert "V_p*/ALG" in text and "> ALG" in text and "computed" in text
    rows = list(csv.DictReader(io.StringIO(render_csv(report))))
    assert {r["exceeds_alg"] for r in rows if r["record"] == "depth"} == {"false"}

    # the command line value still overrides the others, and is labelled as given
    over = build_report(open_study(copy), ground_states={"sk": 0.77}).ensembles[0]
    assert over.references.ground_state == 0.77 and over.references.ground_state_origin == "command line"
    assert over.references.threshold_origin == "computed"


def test_table_does_not_change_with_the_reference_cache(store_path, tmp_path, monkeypatch):
    """The same store gives the same table whether the user-wide cache of `leadline reference`
    is empty or holds a quick, less precise SK result (3 steps): the table never reads it."""
    import contextlib

    from leadline.jobs import reference_cache
    from leadline.kernels.reference import COARSE, reference_energies

    def table() -> str:
        out = io.StringIO()
        with contextlib.redirect_stdout(out):
            main(["table", str(store_path), "--format", "json"])
        return out.getvalue()

    monkeypatch.setenv("LEADLINE_CACHE_DIR", str(tmp_path / "empty"))
    empty = table()
    cache = tmp_path / "filled"
    settings = dict(gs_tol=1e-2, alg_tol=1e-2, max_steps=3)
    for xi in ("2:0.5", "2:0.5,4:0.25"):
        refs = reference_energies(xi, discretization=COARSE, **settings)
        reference_cache.store(cache, reference_cache.cache_key(parse_mixture(xi).spec(), **settings), refs)
    monkeypatch.setenv("LEADLINE_CACHE_DIR", str(cache))
    assert table() == empty
    sk = json.loads(empty)["ensembles"][0]
    # the shipped Parisi value (Crisanti, Rizzo, Phys. Rev. E 65, 046137 (2002)), named as such
    assert sk["references"]["ground_state"] == SK_PARISI
    assert sk["references"]["ground_state_origin"] == "shipped table"
    assert "Crisanti" in sk["references"]["ground_state_source"]


# ------------------------------------------------------------------- demo
def test_shipped_demo_spec_is_valid(tmp_path):
    from leadline.jobs.demo import shipped_spec_text
    from leadline.jobs.spec import parse_spec

    spec = parse_spec(shipped_spec_text(), tmp_path)
    assert [e.label for e in spec.ensembles] == ["sk", "pure3", "pure4", "mixed23", "xorsat3-d4"]
    assert spec.executor == "auto" and spec.workers == 2  # small passes in-process; a cluster only when it pays
    assert (spec.pmin, spec.pmax) == (1, 6)
    assert spec.store == tmp_path / "demo.zarr"


def test_fits_above_the_union_bound_are_flagged():
    # stated synthetic model V_p = 1.5 - 1/p for xi = x^2/2: its limit 1.5 exceeds the bound
    # sqrt(2 ln 2 xi(1)) = sqrt(ln 2) = 0.8326 (first-moment bound), so the report must say so
    depths = [{"p": p, "value": 1.5 - 1.0 / p, "gamma": [], "beta": [], "gradient_norm": None} for p in range(1, 6)]
    study = InMemoryStudy("bound", [({"label": "x", "kind": "dense", "xi": "2:0.5", "reference": {}}, depths)])
    rep = build_report(study, ground_states={"x": 2.0}).ensembles[0]
    assert any("upper bound" in n and "0.8326" in n for n in rep.notes)


def test_a_depth_that_did_not_converge_is_said_in_the_table_and_the_sweep_line():
    # SK values of Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022), Table 1; p = 3 marked as the
    # optimizer records a run stopped before the gradient tolerance (converged false, gradient norm above it)
    depths = [{"p": p, "value": v, "gamma": [], "beta": [], "gradient_norm": 2e-7 if p == 3 else 5e-8,
               "converged": p != 3} for p, v in list(SK_PUBLISHED.items())[:4]]
    study = InMemoryStudy("stopped", [({"label": "sk", "kind": "dense", "xi": "2:0.5", "reference": {}}, depths)])
    report = build_report(study)
    notes = [n for n in report.ensembles[0].notes if n.startswith("not converged")]
    assert len(notes) == 1 and notes[0].startswith("not converged at p = 3:")
    assert "Note: not converged at p = 3:" in render_markdown(report)
    assert json.loads(render_json(report))["ensembles"][0]["depths"][2]["converged"] is False
    from leadline.jobs.sweep import depth_line

    timings = {"wall_time_s": 0.1, "this_session": {"passes_requested": 0}}
    line = {"label": "sk", "p": 3, "result": dict(depths[2], evaluations=9), "timings": timings}
    assert "gradient norm 2.0e-07 (not converged)  9 evaluations" in depth_line(line)
    line["result"]["converged"] = True
    assert "(not converged)" not in depth_line(line)


def test_plot_draws_every_family_and_the_back_test(tmp_path):
    """The figure of a back-tested extrapolation (published SK values, in memory) has the documented size."""
    from matplotlib.image import imread

    depths = [{"p": p, "value": v, "gamma": [], "beta": [], "gradient_norm": None} for p, v in SK_PUBLISHED.items()]
    study = InMemoryStudy("published", [({"label": "sk", "kind": "dense", "xi": "2:0.5", "reference": {}}, depths)])
    report = build_report(study)
    ex = report.ensembles[0].extrapolation
    assert ex.limit is not None and {w.family for w in ex.fits} == {
        "linear-in-1/p", "quadratic-in-1/p", "cubic-in-1/p", "free-power-law", "power-law-to-GS"}
    out = tmp_path / "sk.png"
    write_plots(report, out)
    img = imread(out)
    w, h = FIGURE_SIZE_INCHES
    assert img.shape[:2] == (round(h * FIGURE_DPI), round(w * FIGURE_DPI))
    assert np.unique(img.reshape(-1, img.shape[-1]), axis=0).shape[0] > 20


def test_plot_marks_the_bath_depths(tmp_path, drawn):
    """Exact depths are dots, bath-engine depths diamonds with their error estimate as an error bar and
    a legend entry naming them (this tool's SK sweep to p = 33, tests/sk_deep_optima.csv), in the
    figure and in its inset."""
    from leadline.jobs.report._plots import BATH_MARKER
    from leadline.tests.extrapolation_calibration import load_deep_ladder

    values, estimates = load_deep_ladder()
    depths = [{"p": p, "value": v, "gamma": [], "beta": [], "gradient_norm": None, "error_estimate": estimates[p],
               "method": "bath" if estimates[p] else "exact"} for p, v in sorted(values.items())]
    study = InMemoryStudy("deep", [({"label": "sk", "kind": "dense", "xi": "2:0.5", "reference": {}}, depths)])
    write_plots(build_report(study), tmp_path / "deep.png")
    (ax,) = [a for a in drawn[0].axes if a.get_xlabel()]

    def series(axes, marker):
        return [line for line in axes.get_lines() if line.get_linestyle() == "None" and line.get_marker() == marker]

    (dots,) = [line for line in series(ax, "o") if line.get_label().startswith("sk: ")]  # (not the held-out rings)
    (diamonds,) = series(ax, BATH_MARKER)
    assert list(dots.get_xdata()) == [1.0 / p for p in range(1, 17)]
    assert list(diamonds.get_xdata()) == [1.0 / p for p in range(17, 34)]
    assert list(diamonds.get_ydata()) == [values[p] for p in range(17, 34)]
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert f"  bath engine, p = 17..33 (error estimate <= {max(estimates[p] for p in range(17, 34)):.1e})" in labels
    (inset,) = [a for a in ax.child_axes if getattr(a, "get_title", lambda: "")().startswith("zoom")]
    assert series(inset, BATH_MARKER) and all(x < 1.0 / 16 for x in series(inset, BATH_MARKER)[0].get_xdata())


# ----------------------------------------------- honest extrapolation output
def _sk_ladder_study(pmax, name="sk-ladder", kind="dense", uncertainty=None):
    """The stored SK optima of this tool (tests/sk_optima.csv) up to pmax, held in memory."""
    from leadline.tests.extrapolation_calibration import load_ladder

    ladder = load_ladder()
    depths = [{"p": p, "value": v, "gamma": [], "beta": [], "gradient_norm": None} for p, v in ladder.items() if p <= pmax]
    if uncertainty is not None:
        for d in depths:
            d["error_estimate"] = uncertainty(d["p"])  # as the bath engine records it
    return InMemoryStudy(name, [({"label": "sk", "kind": kind, "xi": "2:0.5", "reference": {}}, depths)])


def test_six_depths_give_no_headline_but_say_what_each_family_gives():
    report = build_report(_sk_ladder_study(6), at_depths=(50,))
    ex = report.ensembles[0].extrapolation
    assert ex.limit is None and ex.at_depth == {} and ex.levels == []
    text = render_markdown(report)
    assert "No headline: too few depths for an extrapolation (6, at least 8 needed)" in text
    assert "V_inf estimate" not in text and "Predicted depth" not in text
    for fam in ("linear-in-1/p", "quadratic-in-1/p", "cubic-in-1/p", "free-power-law", "power-law-to-GS"):
        assert f"- {fam} (window " in text
    rows = list(csv.DictReader(io.StringIO(render_csv(report))))
    assert not [r for r in rows if r["record"] in ("extrapolation", "at_depth", "depth_for")]
    assert any(r["note"].startswith("no headline: too few depths") for r in rows)
    assert json.loads(render_json(report))["ensembles"][0]["extrapolation"]["declined"].startswith("too few depths")


def test_depth_for_a_ratio_says_when_these_depths_do_not_determine_it():
    report = build_report(_sk_ladder_study(12))
    ex = report.ensembles[0].extrapolation
    ninety_nine = next(lv for lv in ex.levels if lv.name == "ratio 0.99")
    # the low band of V_inf stays below 0.99 GS: the depth has no upper end on this evidence
    assert ex.limit.low < 0.99 * SK_PARISI and not ninety_nine.determined
    assert "not determined by these depths" in render_markdown(report)
    rows = list(csv.DictReader(io.StringIO(render_csv(report))))
    (row,) = [r for r in rows if r["quantity"] == "depth_for_ratio_0.99"]
    assert row["high"] == "" and "not determined" in row["note"]


def test_plot_limits_are_set_by_the_data_and_the_used_fits(drawn, tmp_path):
    """SK p <= 12: the free power law is unphysical (it rises to ~0.83 > GS) and must not stretch the
    axis; every stored value and every used fit as drawn lies inside the limits; the inset shows the
    last depths."""
    from leadline.jobs.report import inset_extent, value_axis_limits

    report = build_report(_sk_ladder_study(12))
    rep = report.ensembles[0]
    ex = rep.extrapolation
    write_plots(report, tmp_path / "sk.png")
    value_fig = drawn[0]
    (ax,) = [a for a in value_fig.axes if a.get_xlabel()]
    lo, hi = ax.get_ylim()
    assert (lo, hi) == pytest.approx(value_axis_limits(report))
    for r in rep.rows:
        assert lo < r.value < hi
    used_lines = [line for line in ax.get_lines() if len(line.get_xdata()) == 200 and line.get_alpha() == 0.9]
    assert len(used_lines) == len(ex.best_by_family())
    for line in used_lines:
        assert lo < min(line.get_ydata()) and max(line.get_ydata()) < hi
    rejected = [w for w in ex.fits if not w.used]
    assert rejected and max(w.fit.peak_beyond(12) for w in rejected) > hi + 0.02  # would have stretched it
    faint = [line for line in ax.get_lines() if len(line.get_xdata()) == 200 and line.get_alpha() != 0.9]
    assert faint and all(line.get_alpha() <= 0.25 for line in faint)
    assert ex.limit.low > lo and ex.limit.high < hi
    # no rejected fit decides the limits: drop them and the limits stay
    from dataclasses import replace

    kept = replace(rep, extrapolation=replace(ex, fits=[w for w in ex.fits if w.used]))
    assert value_axis_limits(replace(report, ensembles=[kept])) == pytest.approx((lo, hi))
    (inset,) = [a for a in ax.child_axes if getattr(a, "get_title", lambda: "")().startswith("zoom")]
    x0, x1 = inset.get_xlim()
    last = [r.inv_p for r in rep.rows[-5:]]
    assert x0 < 0 and x1 == pytest.approx(inset_extent(report)) and all(x0 < x < x1 for x in last)
    assert 1.0 / 7 > x1  # depth 7 and below are outside the inset: it shows the last depths
    ilo, ihi = inset.get_ylim()
    assert all(ilo < r.value < ihi for r in rep.rows[-5:])


def test_sparse_ensembles_follow_the_same_rules():
    """A sparse ensemble's satisfied fraction: the same minimum of depths, a range below the
    fraction's maximum 1 and above the last computed value (a stated synthetic model
    nu_p = 0.95 - 0.3 p^-0.8, not physics data)."""
    def study(pmax):
        depths = [{"p": p, "value": 0.95 - 0.3 * p ** -0.8, "gamma": [], "beta": [], "gradient_norm": None}
                  for p in range(1, pmax + 1)]
        return InMemoryStudy("sparse", [({"label": "x", "kind": "sparse", "q": 3, "degree": 4}, depths)])

    few = build_report(study(6)).ensembles[0].extrapolation
    assert few.limit is None and few.declined.startswith("too few depths")
    ex = build_report(study(10)).ensembles[0].extrapolation
    assert ex.upper_bound == 1.0 and ex.declined is None
    assert 0.95 - 0.3 * 10 ** -0.8 <= ex.limit.low <= ex.limit.central <= ex.limit.high <= 1.0
    assert ex.limit.covers(0.95)
    assert "nu_inf estimate" in render_markdown(build_report(study(10)))


def test_depth_uncertainties_in_the_records_weight_the_fits():
    """Depths from an approximate engine carry error_estimate in their record: the fits are
    weighted (exact depths far above them) and the table says so; records without it are exact."""
    report = build_report(_sk_ladder_study(12, uncertainty=lambda p: 2e-5 if p > 9 else None))
    ex = report.ensembles[0].extrapolation
    assert ex.uncertain_depths == 3 and all(w.fit.sigmas is not None for w in ex.fits)
    assert "3 depth(s) carry an error estimate (bath engine)" in render_markdown(report)
    plain = build_report(_sk_ladder_study(12)).ensembles[0].extrapolation
    assert plain.uncertain_depths == 0 and all(w.fit.sigmas is None for w in plain.fits)
