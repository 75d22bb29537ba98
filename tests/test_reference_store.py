"""`leadline reference --store`: computed GS/ALG cached in the study store and used by `table`.

Check value: SK ground state 0.763166, Crisanti, Rizzo, Phys. Rev. E 65, 046137 (2002)
(coarse tolerance here; the tight check is in test_reference.py).
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from leadline.storage import open_study

SPEC = """
[study]
name = "refs"
store = "refs.zarr"
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


def leadline(*args, cwd):
    return subprocess.run([sys.executable, "-m", "leadline", *args], capture_output=True, text=True, cwd=cwd, timeout=300)


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    folder = tmp_path_factory.mktemp("refs")
    (folder / "spec.toml").write_text(SPEC)
    r = leadline("sweep", "spec.toml", "--quiet", cwd=folder)
    assert r.returncode == 0, r.stderr
    return folder


def test_references_cached_in_store_and_used_by_table(store):
    r = leadline("reference", "--store", "refs.zarr", "--max-steps", "3", "--gs-tol", "1e-2", "--alg-tol", "1e-2", "--json",
                 cwd=store)
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert set(out) == {"sk"}  # the sparse ensemble has no mixture: skipped
    refs = open_study(store / "refs.zarr").references("sk")
    assert refs is not None and refs.ground_state == pytest.approx(0.763166, abs=2e-3)
    assert open_study(store / "refs.zarr").references("cut3") is None
    t = leadline("table", "refs.zarr", "--format", "json", cwd=store)
    assert t.returncode == 0, t.stderr
    sk = next(e for e in json.loads(t.stdout)["ensembles"] if e["label"] == "sk")
    # the shipped Parisi value 0.763166 +- 1e-6 (Crisanti & Rizzo, Phys. Rev. E 65, 046137 (2002)) is
    # more precise than three quick steps: it is the one used, and the note names the stored one
    assert sk["references"]["ground_state"] == 0.763166
    assert sk["references"]["ground_state_origin"] == "shipped table"
    assert any("the store also holds a computed GS" in n for n in sk["notes"])
    # ALG has no shipped value: the computed one from the store
    assert sk["references"]["algorithmic_threshold"] == pytest.approx(refs.algorithmic_threshold)
    assert sk["references"]["algorithmic_threshold_origin"] == "computed"


@pytest.mark.parametrize(
    "args,fragment",
    [
        (["--store", "refs.zarr", "--xi", "2:0.5"], "not both"),
        (["--store", "refs.zarr", "--ensemble", "nope"], "not in the study"),
        (["--store", "missing.zarr"], "no study store"),
        (["--xi", "2:0.5", "--ensemble", "sk"], "goes with --store"),
    ],
)
def test_bad_store_arguments(store, args, fragment):
    r = leadline("reference", *args, cwd=store)
    assert r.returncode == 2 and fragment in r.stderr and len(r.stderr.strip().splitlines()) == 1
