"""Reports: Markdown tables and plots written from ``metrics.json`` results.

Every ``report.md`` gets a ``report.html`` beside it with the same content: one static page, its
plots embedded as base64 PNG and its style inline, so it opens from disk with no network.

The pages' Markdown is written in ``_pages``, their plots drawn in ``_plots`` and the HTML page made
from the Markdown in ``_html``.
"""

from shapes.report._html import markdown_to_html, write_report
from shapes.report._pages import REGIME_NOTES, comparison_report, perturbation_sections, pose_matrix_row, run_report
from shapes.report._pages import twin_warnings
from shapes.report._plots import (CURVES, curve_scale, plot_angle_sweep, plot_confusion, plot_perturbations,
                                  plot_reliability, pyplot, save_figure, visible_curve)

__all__ = ["run_report", "comparison_report", "plot_confusion", "plot_angle_sweep", "plot_reliability",
           "plot_perturbations", "markdown_to_html", "write_report", "pyplot", "save_figure", "pose_matrix_row",
           "perturbation_sections", "twin_warnings", "visible_curve", "curve_scale", "CURVES",
           "REGIME_NOTES"]
