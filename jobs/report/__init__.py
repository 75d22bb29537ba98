"""Depth tables and plots of a finished (or partly finished) study: `leadline table` and `leadline plot`.

The report is one subject with one public face: the names below are all that commands, the
API and tests use, so its private modules can change without touching them.

The names below are imported on first use.
"""

from __future__ import annotations

from leadline._lazy import lazy_names

_WHERE = {
    name: "_model"
    for name in (
        "InMemoryStudy", "References", "DepthRow", "EnsembleReport", "StudyReport", "build_report",
        "build_ensemble_report", "resolve_references", "load_study", "render_markdown", "render_csv",
        "render_json", "CSV_COLUMNS", "TABLE_FORMAT", "TABLE_VERSION", "write_plots", "angle_plot_path",
        "FIGURE_SIZE_INCHES", "FIGURE_DPI",
    )
}

__all__ = list(_WHERE)

__getattr__, __dir__ = lazy_names(__name__, _WHERE)
