"""The Python API (`import leadline`): published values, and the same records as the command line.

Sources: SK p = 1 optimum 1/sqrt(4e) at gamma = 1/2, beta = pi/8 and Table 1 (V_1*, V_2*) of
Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022); MaxCut on D-regular graphs of large
girth at p = 1, optimum 1/2 + (1/2) D^(-1/2) ((D-1)/D)^((D-1)/2) at tan g = 1/sqrt(D-1),
b = pi/8: Wang, Hadfield, Jiang, Rieffel, PRA 97, 022304 (2018).
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import pytest

import leadline

CLI = [sys.executable, "-m", "leadline"]

#: keys whose values are measured times, not results
TIMES = {"wall_time_s", "history"}


def _cli_json(*args: str, cwd=None) -> dict:
    proc = subprocess.run(CLI + list(args) + ["--json"], capture_output=True, text=True, cwd=cwd, timeout=300)
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout)


def _strip(record: dict) -> dict:
    return {k: v for k, v in record.items() if k not in TIMES}


def test_evaluate_sk_p1_optimum_and_same_record_as_the_cli():
    ev = leadline.evaluate("2:0.5", [0.5], [math.pi / 8], gradient=True)
    assert abs(ev.value - 1 / math.sqrt(4 * math.e)) < 1e-12  # Farhi et al. (2022)
    assert max(abs(x) for x in ev.gradient["gamma"]) < 1e-10  # the optimum is stationary
    cli = _cli_json("evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", repr(math.pi / 8), "--gradient")
    assert _strip(ev.to_json()) == _strip(cli)


def test_optimize_ladder_matches_table_1_and_the_cli():
    opt = leadline.optimize("2:0.5", 2)
    assert [round(s["value"], 4) for s in opt.ladder] == [0.3033, 0.4075]  # Table 1 of Farhi et al. (2022)
    cli = _cli_json("optimize", "--xi", "2:0.5", "--depth", "2")
    ours = opt.to_json()
    assert set(ours) == set(cli)
    assert _strip(ours)["ladder"] == cli["ladder"]
    assert ours["gamma"] == cli["gamma"] and ours["beta"] == cli["beta"] and ours["value"] == cli["value"]


def test_optimize_from_angles_warm_starts_the_next_depth():
    first = leadline.optimize("2:0.5", 1)
    second = leadline.optimize("2:0.5", 2, angles=(first.gamma, first.beta))
    assert [s["p"] for s in second.ladder] == [2]
    assert round(second.value, 4) == 0.4075  # Table 1 of Farhi et al. (2022)


@pytest.mark.parametrize("D", [3, 5])
def test_sparse_maxcut_p1_closed_form(D):
    g, b = math.atan(1 / math.sqrt(D - 1)), math.pi / 8
    exact = 0.5 + 0.5 * D**-0.5 * ((D - 1) / D) ** ((D - 1) / 2)  # Wang et al., PRA 97, 022304 (2018)
    ev = leadline.evaluate_sparse(2, D, [g], [b])
    assert abs(ev.value - exact) < 1e-10
    cli = _cli_json("evaluate", "--sparse-q", "2", "--degree", str(D), "--gamma", repr(g), "--beta", repr(b))
    assert _strip(ev.to_json()) == {k: v for k, v in _strip(cli).items() if k != "ensemble"}


def test_optimize_sparse_record_is_the_cli_record():
    opt = leadline.optimize_sparse(2, 3, 1)
    assert round(opt.value, 4) == 0.6925  # Farhi, Goldstone, Gutmann, arXiv:1411.4028 (2014)
    cli = _cli_json("optimize", "--sparse-q", "2", "--degree", "3", "--depth", "1")
    assert set(opt.to_json()) == set(cli)
    assert opt.to_json()["ensemble"] == cli["ensemble"] and opt.to_json()["value"] == cli["value"]


def test_bad_input_raises_the_cli_message():
    with pytest.raises(leadline.InputError, match="xi"):
        leadline.evaluate("2:-1", [0.5], [0.3])
    with pytest.raises(ValueError, match="same number"):
        leadline.evaluate("2:0.5", [0.5, 0.1], [0.3])
    with pytest.raises(leadline.InputError, match="degree"):
        leadline.evaluate_sparse(2, 1, [0.5], [0.3])
    with pytest.raises(leadline.InputError, match="depth"):
        leadline.optimize("2:0.5", 0)


def test_values_outside_the_double_range_raise_as_on_the_cli():
    # SK p = 1: V_1 = g sin(4b) exp(-2 g^2) (Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759
    # (2022)) is about 1.6e-2170 at g = 50; at p = 2, gamma = (50, 50) the 60-digit value is
    # 1.5e-759 (tests/test_unusual_input.py computes it with mpmath): neither is a double
    with pytest.raises(leadline.InputError, match="out of the double-precision range"):
        leadline.evaluate("2:0.5", [50.0], [0.3], executor="inprocess")
    with pytest.raises(leadline.InputError, match="V_p underflows"):
        leadline.evaluate("2:0.5", [50.0, 50.0], [0.3, 0.2], executor="inprocess")
    # a true 0 near the origin is returned
    assert leadline.evaluate("2:0.5", [0.0, 0.0], [0.3, 0.2], executor="inprocess").value == 0.0


def test_the_api_names_are_documented():
    for name in ("evaluate", "optimize", "evaluate_sparse", "optimize_sparse", "reference_energies",
                 "open_study", "study_dataframe", "evaluate_bath", "transfer", "sweep", "resume", "status"):
        fn = getattr(leadline, name)
        assert name in dir(leadline)
        doc = fn.__doc__ or ""
        assert "Returns" in doc or "Parameters" in doc, f"{name} has no numpy-style docstring"
    with pytest.raises(AttributeError):
        leadline.no_such_name  # noqa: B018


SPEC = """
[study]
name = "frame"
store = "frame.zarr"

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
label = "cut3"
kind = "sparse"
q = 2
degree = 3
"""


@pytest.fixture(scope="module")
def small_study(tmp_path_factory) -> Path:
    folder = tmp_path_factory.mktemp("frame")
    (folder / "frame.toml").write_text(SPEC)
    proc = subprocess.run(CLI + ["sweep", "frame.toml", "--quiet"], cwd=folder, capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr
    return folder / "frame.zarr"


def test_open_study_reads_what_the_sweep_stored(small_study):
    study = leadline.open_study(small_study)
    assert study.ensembles() == ["sk", "cut3"]
    assert [round(d["value"], 4) for d in study.depths("sk")] == [0.3033, 0.4075]  # Table 1, Farhi et al. (2022)
    with pytest.raises(leadline.InputError):
        leadline.open_study(small_study.parent / "missing.zarr")


def test_a_finished_study_is_a_dataframe(small_study):
    pytest.importorskip("pandas", reason="pandas is the optional extra 'pandas' (installed with the test extra)")
    study = leadline.open_study(small_study)
    frame = leadline.study_dataframe(small_study)
    assert list(frame["ensemble"]) == ["sk", "sk", "cut3", "cut3"]
    assert list(frame["p"]) == [1, 2, 1, 2]
    assert list(frame["kind"]) == ["dense", "dense", "sparse", "sparse"]
    for label in study.ensembles():
        rows = frame[frame.ensemble == label]
        for (_, row), depth in zip(rows.iterrows(), study.depths(label)):
            assert row["value"] == depth["value"] and list(row["gamma"]) == list(depth["gamma"])
    assert round(frame.loc[(frame.ensemble == "cut3") & (frame.p == 1), "value"].item(), 4) == 0.6925  # FGG 2014


def test_transfer_from_python_is_the_cli_record(tmp_path):
    # MaxCut on the 8-cycle at p = 1: every edge of a ring of girth 8 > 3 sees a tree, so <C> per
    # edge is 3/4 at the optimum (Farhi, Goldstone, Gutmann, arXiv:1411.4028 (2014), the ring of disagrees)
    ring = tmp_path / "ring8.txt"
    ring.write_text("".join(f"-1 {i} {(i + 1) % 8}\n" for i in range(8)))
    got = leadline.transfer(ring, depth=1)
    cli = _cli_json("transfer", str(ring), "--depth", "1")
    assert _strip(got.to_json()) == _strip(cli)
    assert got["best"] == 8.0
    with pytest.raises(leadline.InputError):
        leadline.transfer(tmp_path / "missing.txt", depth=1)


def test_evaluate_bath_takes_a_mixture_string():
    # SK p = 1 optimum 1/sqrt(4e) (Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022))
    bath = leadline.evaluate_bath("2:0.5", [0.5], [math.pi / 8])
    assert abs(bath.value - 1 / math.sqrt(4 * math.e)) < 1e-6


# ------------------------------------------------------------------ BLAS threads
def _blas_threads() -> list[int]:
    from threadpoolctl import threadpool_info

    return [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]


def test_api_and_command_line_compute_with_blas_capped(monkeypatch):
    """threadpoolctl reports one BLAS thread inside a computation (the default), the number asked
    for with LEADLINE_BLAS_THREADS, and the process's own setting again afterwards."""
    import contextlib
    import io

    import numpy  # noqa: F401  (numpy's BLAS is loaded)
    from threadpoolctl import threadpool_limits

    from leadline.jobs.cli import main
    from leadline.kernels import exact

    real = exact.evaluate
    seen: list[list[int]] = []

    def spy(*args, **kwargs):
        seen.append(_blas_threads())
        return real(*args, **kwargs)

    monkeypatch.setattr(exact, "evaluate", spy)
    from leadline.jobs.commands import evaluate as evaluate_command

    monkeypatch.setattr(evaluate_command, "evaluate_kernel", spy)
    monkeypatch.delenv("LEADLINE_BLAS_THREADS", raising=False)
    with threadpool_limits(limits=2, user_api="blas"):
        before = _blas_threads()
        leadline.evaluate("2:0.5", [0.5], [0.3])
        assert seen[-1] and set(seen[-1]) == {1}
        assert _blas_threads() == before  # restored
        with contextlib.redirect_stdout(io.StringIO()):
            main(["evaluate", "--xi", "2:0.5", "--gamma", "0.5", "--beta", "0.3"])
        assert set(seen[-1]) == {1} and _blas_threads() == before
        monkeypatch.setenv("LEADLINE_BLAS_THREADS", "3")
        leadline.evaluate("2:0.5", [0.5], [0.3])
        assert set(seen[-1]) == {3}
        monkeypatch.setenv("LEADLINE_BLAS_THREADS", "auto")
        leadline.evaluate("2:0.5", [0.5], [0.3])
        assert seen[-1] == before  # left as it was
    monkeypatch.setenv("LEADLINE_BLAS_THREADS", "many")
    with pytest.raises(leadline.InputError, match="LEADLINE_BLAS_THREADS"):
        leadline.evaluate("2:0.5", [0.5], [0.3])
