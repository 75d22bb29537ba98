"""Sparse ensembles: Max-q-XORSAT on D-regular hypergraphs of large girth.

What it computes: the exact satisfied fraction of QAOA at depth p by the hypertree recursion
(Walsh-Hadamard transforms on the growing contour), its gradient, and its angle optimizer.
Module (private): ``_recursion``.

May import: numpy, :mod:`leadline.kernels.mixture`, the contour layout of
:mod:`leadline.kernels.exact` and the angle helpers of :mod:`leadline.kernels.optimize`.

The names below are imported on first use, so importing the package stays light.
"""

from __future__ import annotations

from leadline._lazy import lazy_names

_WHERE = {
    "SparseEvaluation": "_recursion",
    "SparseIntegrityError": "_recursion",
    "RunMap": "_recursion",
    "evaluate_sparse": "_recursion",
    "value_and_grad": "_recursion",
    "sparse_to_dense_angles": "_recursion",
    "dense_to_sparse_angles": "_recursion",
    "scaled_value": "_recursion",
    "wht": "_recursion",
    "wht_blocked": "_recursion",
    "wht_rows_chunk": "_recursion",
    "wht_columns_chunk": "_recursion",
    "split_transform": "_recursion",
    "run_map_inprocess": "_recursion",
    "complex_log1p": "_recursion",
    "phase_vector": "_recursion",
    "sum_fH_tolerance": "_recursion",
    "optimize_sparse": "_recursion",
    "SparseOptimization": "_recursion",
    "check_problem": "_recursion",
}

__all__ = list(_WHERE)

__getattr__, __dir__ = lazy_names(__name__, _WHERE)
