"""Sparse evaluations on the Dask executor: the split transform gives the same numbers.

Check value: MaxCut on 3-regular triangle-free graphs at p = 1, optimum 1/2 + 1/(3 sqrt 3) = 0.692450
at tan g = 1/sqrt 2, b = pi/8 (closed form of Wang, Hadfield, Jiang, Rieffel, Phys. Rev. A 97, 022304
(2018); quoted as 0.6925 by Farhi, Goldstone, Gutmann, arXiv:1411.4028 (2014)).
(That the Dask map keeps block order is checked in test_cluster.py on a real LocalCluster.)
"""

from __future__ import annotations

import json
import math
import subprocess
import sys

import pytest


def evaluate(*extra):
    args = ["evaluate", "--sparse-q", "3", "--degree", "4", "--gamma", "0.4,0.6,0.7", "--beta", "0.5,0.3,0.2",
            "--gradient", "--json", *extra]
    r = subprocess.run([sys.executable, "-m", "leadline", *args], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout)


def test_local_cluster_matches_in_process():
    here = evaluate("--executor", "inprocess")
    there = evaluate("--executor", "local", "--workers", "1", "--quiet")
    assert there["value"] == pytest.approx(here["value"], abs=1e-12)
    for key in ("gamma", "beta"):
        assert there["gradient"][key] == pytest.approx(here["gradient"][key], abs=1e-12)


def test_optimize_on_local_cluster_reproduces_published_maxcut():
    # MaxCut, 3-regular, triangle-free, p = 1 optimum 1/2 + 1/(3 sqrt 3) (Wang, Hadfield, Jiang,
    # Rieffel, PRA 97, 022304 (2018)); one start keeps the number of Dask round trips small
    args = ["optimize", "--sparse-q", "2", "--degree", "3", "--depth", "1", "--restarts", "0", "--json",
            "--executor", "local", "--workers", "1", "--quiet"]
    r = subprocess.run([sys.executable, "-m", "leadline", *args], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert abs(json.loads(r.stdout)["value"] - (0.5 + 1 / (3 * math.sqrt(3)))) < 1e-6
