"""Depth tables and plots of a finished (or partly finished) study: `leadline table` and `leadline plot`.

A package rather than one module because its parts change for different reasons: what a table
says (the model), how it is written down (Markdown, CSV/JSON) and how it is drawn (the
figures).  Its public names are listed once below; commands, the API and tests import only
these, never a private module.  Private modules:

- ``_model``: the report model: reading a study (a store or :class:`InMemoryStudy`), one row
  per finished depth, the extrapolation and the notes (:class:`StudyReport`, :func:`build_report`);
- ``_references``: the reference energies GS and ALG of an ensemble by precedence
  (command line, spec, computed and cached, shipped table);
- ``_universality``: sparse ensembles scaled next to the dense q-spin V_p*;
- ``_markdown``: the Markdown renderer (`leadline table`, the default format);
- ``_csv_json``: the CSV and JSON renderers (`--format csv|json`);
- ``_plots``: the two PNG figures (`leadline plot`; matplotlib imported inside).

May import: ``leadline.kernels`` and ``leadline.storage`` (to open a store), and
``leadline.jobs.errors`` / ``reference_cache``; never a command module.

The names below are imported on first use (PEP 562).
"""

from __future__ import annotations

from leadline._lazy import lazy_names

_WHERE = {
    "InMemoryStudy": "_model",
    "load_study": "_model",
    "DepthRow": "_model",
    "EnsembleReport": "_model",
    "StudyReport": "_model",
    "build_ensemble_report": "_model",
    "build_report": "_model",
    "TABLE_FORMAT": "_model",
    "TABLE_VERSION": "_model",
    "References": "_references",
    "resolve_references": "_references",
    "short_of_tolerance": "_references",
    "render_markdown": "_markdown",
    "CSV_COLUMNS": "_csv_json",
    "render_csv": "_csv_json",
    "render_json": "_csv_json",
    "write_plots": "_plots",
    "angle_plot_path": "_plots",
    "value_figure": "_plots",
    "value_axis_limits": "_plots",
    "inset_extent": "_plots",
    "FIGURE_SIZE_INCHES": "_plots",
    "FIGURE_DPI": "_plots",
}

__all__ = list(_WHERE)

__getattr__, __dir__ = lazy_names(__name__, _WHERE)
