"""Reporting: figures, the self-contained HTML page of a fit, and the study page."""

from stackdr.reporting._figures import FIGURES, render_figures
from stackdr.reporting._fit_page import SECTIONS, write_report
from stackdr.reporting._study_page import (
    ESTIMATOR_ORDER,
    html_report,
    markdown_table,
    ordered,
    summary_text,
    text_table,
    with_mcse,
)

__all__ = [
    "ESTIMATOR_ORDER",
    "FIGURES",
    "SECTIONS",
    "html_report",
    "markdown_table",
    "ordered",
    "render_figures",
    "summary_text",
    "text_table",
    "with_mcse",
    "write_report",
]
