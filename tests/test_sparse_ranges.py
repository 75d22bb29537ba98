"""Sparse ensembles at very large degree: values against a 50-digit reference, and the
integrity tolerance against the rounding the recursion really incurs.

Reference: tests/precise_reference.py::precise_sparse, the hypertree recursion of Basso,
Farhi, Marwaha, Villalonga, Zhou (TQC 2022, arXiv:2110.14206) and Basso, Gamarnik, Mei,
Zhou (FOCS 2022, arXiv:2204.10306) as plain sums with mpmath at 50 digits (the power D-1
taken directly, no log1p).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from leadline.kernels.sparse import SparseIntegrityError, evaluate_sparse, sum_fH_tolerance
from leadline.tests.precise_reference import precise_sparse

UNIT_ROUNDOFF = 2.2e-16


@pytest.mark.parametrize("q", [2, 3])
@pytest.mark.parametrize("degree", [3, 1e4, 1e8, 1e9])
@pytest.mark.parametrize("scaled", [True, False])
def test_large_degree_values_agree_with_mpmath(q, degree, scaled):
    beta = [0.45, 0.2]
    if scaled:  # the universality scaling g = 2 sqrt(q) gamma / sqrt(D) (Basso et al., FOCS 2022)
        gamma = [2 * math.sqrt(q) * x / math.sqrt(degree) for x in (0.4, 0.55)]
    else:
        gamma = [0.1, 0.2]
    ref, _ = precise_sparse(q, degree, gamma, beta)
    ev = evaluate_sparse(q, degree, gamma, beta)
    assert abs(ev.value - float(ref)) <= 1e-14


@pytest.mark.parametrize("q", [2, 3, 9])
@pytest.mark.parametrize("degree", [1e6, 1e8, 1e9])
def test_tolerance_covers_the_rounding_at_large_degree(q, degree):
    # unscaled angles are the hard case: (D-1) log1p(message - 1) is a large phase
    rng = np.random.default_rng([q, int(math.log10(degree))])
    for p in (2, 3):
        gamma = rng.uniform(0.1, 0.6, p)
        beta = rng.uniform(0.1, 0.5, p)
        ev = evaluate_sparse(q, degree, gamma, beta)  # raised SparseIntegrityError before
        assert ev.residuals["sum_fH"] <= 2 * UNIT_ROUNDOFF * degree + 1e-13
        assert ev.residuals["sum_fH"] <= sum_fH_tolerance(p, degree) / 4


def test_a_lost_block_is_still_caught_at_large_degree():
    lost = []

    def losing_map(func, blocks):
        out = [func(b) for b in blocks]
        if len(out) > 1 and not lost:
            out[-1] = np.zeros_like(out[-1])  # one transform block lost
            lost.append(len(out))
        return out

    with pytest.raises(SparseIntegrityError), np.errstate(all="ignore"):  # the lost block makes H overflow
        evaluate_sparse(3, 1e8, [0.3, 0.2, 0.25], [0.4, 0.1, 0.3], run_map=losing_map, n_high=2)
    assert lost


# ---------------------------------------------------------------- memory refusal of the CLI
def _machine_with(monkeypatch, gib: float):
    import psutil

    class _Mem:
        total = int(gib * 2**30)

    monkeypatch.setattr(psutil, "virtual_memory", lambda: _Mem())


def test_sparse_memory_check_follows_the_measured_buffers(monkeypatch):
    # 1.25 x 2^(2p-1) complex numbers (p = 15: 10 GiB, measured peak 10.1 GiB in
    # docs/performance.md); the gradient about 2.5 times that
    from leadline.jobs.commands._sparse import check_sparse_depth
    from leadline.jobs.errors import InputError

    _machine_with(monkeypatch, 16)
    check_sparse_depth(15, None, "--gamma/--beta")  # 10 GiB of 16: runs
    with pytest.raises(InputError, match=r"p = 15 needs about 25 GiB with the gradient, more than 80% of this machine's 16 GiB"):
        check_sparse_depth(15, None, "--gamma/--beta", gradient=True)
    with pytest.raises(InputError, match=r"p = 16 needs about 40 GiB"):
        check_sparse_depth(16, None, "--depth")
