"""The exact dense pass: V_p(gamma, beta) of a mixed q-spin glass at infinite size, and its gradient.

What it computes: the p-step iteration of moment matrices over one spin's contour paths
(Farhi, Goldstone, Gutmann, Zhou, Quantum 6, 759 (2022); Basso, Gamarnik, Mei, Zhou,
FOCS 2022 for any mixture xi), on the growing contour with the global flip, and the
reverse-mode gradient.  Modules (private): ``_contour`` (path layout and chain weight f),
``_plan`` (how a pass is cut into chunks), ``_patterns`` (sums and chains over sign patterns, shared by both chunk kernels),
``_blocked`` (the matrix-product kernel), ``_chunks`` (the pass contract, the low side, the
row-by-row kernel, the implementation registry; imports ``_blocked``),
``_iteration`` (the p steps and the gradient), ``_ranges`` (the angle range a pass computes
exactly).

May import: numpy and :mod:`leadline.kernels.mixture`; nothing else of the tool.

The names below are imported on first use, so importing the package stays light.
"""

from __future__ import annotations

from leadline._lazy import lazy_names

_WHERE = {
    "n_sites": "_contour",
    "time0_index": "_contour",
    "gamma_vector": "_contour",
    "link_beta_index": "_contour",
    "link_sign": "_contour",
    "link_table": "_contour",
    "link_derivative_table": "_contour",
    "sign_patterns": "_contour",
    "chain_weights": "_contour",
    "path_weights": "_contour",
    "initial_correlations": "_contour",
    "check_angles": "_contour",
    "ChunkPlan": "_plan",
    "plan_chunks": "_plan",
    "DEFAULT_MEMORY_BUDGET": "_plan",
    "estimate_chunk_bytes": "_plan",
    "evaluation_path_visits": "_plan",
    "step_plans": "_plan",
    "PassInput": "_chunks",
    "LowSide": "_chunks",
    "prepare_low_side": "_chunks",
    "chunk_partial": "_chunks",
    "pass_partials": "_chunks",
    "run_pass_inprocess": "_chunks",
    "CHUNK_KERNELS": "_chunks",
    "IMPLEMENTATIONS": "_chunks",
    "DEFAULT_IMPLEMENTATION": "_chunks",
    "resolve_implementation": "_chunks",
    "IMPLEMENTATION_ENV": "_chunks",
    "chunk_partial_blocked": "_blocked",
    "split_low": "_patterns",
    "second_moments_fast": "_blocked",
    "low_matrices": "_blocked",
    "quadratic_split": "_patterns",
    "chain_split": "_patterns",
    "ProductCache": "_blocked",
    "PRODUCTS": "_blocked",
    "COLUMNS": "_blocked",
    "tape_capacity_bytes": "_blocked",
    "PassIntegrityError": "_iteration",
    "Evaluation": "_iteration",
    "evaluate": "_iteration",
    "sum_w_tolerance": "_iteration",
    "RunPass": "_iteration",
    "CONTOURS": "_iteration",
    "expand_correlations": "_iteration",
    "EXPONENT_LIMIT": "_ranges",
    "RangeError": "_ranges",
    "exponent_bound": "_ranges",
    "pass_exponent_bound": "_ranges",
    "max_gamma_sum": "_ranges",
    "check_range": "_ranges",
    "check_pass_range": "_ranges",
}

__all__ = list(_WHERE)

__getattr__, __dir__ = lazy_names(__name__, _WHERE)
