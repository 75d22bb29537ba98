"""leadline: exact infinite-size QAOA energies for mixed-spin glasses.

Python API (documented with examples in docs/api.md)::

    import leadline
    ev = leadline.evaluate("2:0.5", [0.5], [0.392699])      # V_1 of the SK model
    opt = leadline.optimize("3:1", 3)                       # optimal angles, pure 3-spin, p = 3
    leadline.evaluate_sparse(2, 3, [0.6155], [0.3927])      # MaxCut on 3-regular graphs
    leadline.optimize_sparse(3, 4, 2)
    leadline.evaluate_bath("2:0.5", [0.5], [0.392699])        # bosonic-bath engine, error estimate <= 1e-6
    leadline.reference_energies("2:0.5")                    # ground state and algorithmic threshold
    leadline.transfer("graph.txt", depth=2)                 # angles for one instance, checked exactly
    run = leadline.sweep("study.toml")                      # a depth study into a Zarr store (or a dict spec)
    leadline.resume("runs/study.zarr")                      # continue a stopped study where it was
    leadline.status("runs/study.zarr")                      # how far it got (as `leadline status --json`)
    study = leadline.open_study("runs/study.zarr")          # a study store, read-only
    leadline.study_dataframe(study)                         # finished depths as a pandas DataFrame

Every result has ``.to_json()``: the object the matching command prints with ``--json``.
The names are imported on first use, so ``import leadline`` loads nothing heavy.

The import name's four layers live in the repository's top-level folders
(``kernels/``, ``storage/``, ``cluster/``, ``jobs/``) and are mapped onto
``leadline.kernels`` and friends by ``pyproject.toml``.
"""

from __future__ import annotations

__version__ = "0.1.0"

_API = (
    "evaluate",
    "optimize",
    "evaluate_sparse",
    "optimize_sparse",
    "evaluate_bath",
    "reference_energies",
    "transfer",
    "sweep",
    "resume",
    "status",
    "open_study",
    "study_dataframe",
)
_ERRORS = ("InputError",)

__all__ = ["__version__", *_API, *_ERRORS]

from leadline._lazy import lazy_names  # noqa: E402  (after __all__: the names it serves)

__getattr__, __dir__ = lazy_names(__name__, {**{n: "jobs.api" for n in _API}, "InputError": "jobs.errors"})
