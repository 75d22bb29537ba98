"""Sparse ensembles: Max-q-XORSAT on D-regular hypergraphs of large girth.

What it computes: the exact satisfied fraction of QAOA at depth p by the hypertree recursion
(Walsh-Hadamard transforms on the growing contour), its gradient, and its angle optimizer.
Modules (private): ``_recursion`` (the entry :func:`evaluate_sparse`, method notes),
``_common`` (problem check, tolerance, result), ``_transforms`` (Walsh-Hadamard transforms),
``_spectra`` (phases and their closed-form spectra), ``_steps`` (pieces of one step),
``_growing`` and ``_full`` (the two recursions), ``_adjoint`` (the growing contour's reverse
sweep), ``_chunked`` (the growing recursion on chunked vectors in an injected store: out of core
or on Dask workers), ``_optimize`` (the angle optimizer).

May import: numpy, :mod:`leadline.kernels.mixture`, the contour layout of
:mod:`leadline.kernels.exact` and the angle helpers of :mod:`leadline.kernels.optimize`.

The names below are imported on first use, so importing the package stays light.
"""

from __future__ import annotations

from leadline._lazy import lazy_names

_WHERE = {
    "SparseEvaluation": "_common",
    "SparseIntegrityError": "_common",
    "RunMap": "_common",
    "evaluate_sparse": "_recursion",
    "value_and_grad": "_recursion",
    "sparse_to_dense_angles": "_recursion",
    "dense_to_sparse_angles": "_recursion",
    "scaled_value": "_recursion",
    "wht": "_transforms",
    "wht_blocked": "_transforms",
    "wht_rows_chunk": "_transforms",
    "wht_columns_chunk": "_transforms",
    "split_transform": "_transforms",
    "run_map_inprocess": "_transforms",
    "complex_log1p": "_steps",
    "phase_vector": "_spectra",
    "sum_fH_tolerance": "_common",
    "optimize_sparse": "_optimize",
    "SparseOptimization": "_optimize",
    "check_problem": "_common",
    "evaluate_chunked": "_chunked",
    "BandStore": "_chunked",
    "rows_bits": "_chunked",
    "band_bits": "_chunked",
    "step_sizes": "_chunked",
    "reverse_stage": "_chunked",
    "CHUNK_POINTS_BITS": "_chunked",
}

__all__ = list(_WHERE)

__getattr__, __dir__ = lazy_names(__name__, _WHERE)
