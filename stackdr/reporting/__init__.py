"""Reporting: figures, the self-contained HTML page of a fit, and the study page."""

from stackdr.reporting._figures import FIGURES, render_figures
from stackdr.reporting._fit_page import SECTIONS, write_report
from stackdr.reporting._study_page import (
    ESTIMATOR_ORDER,
    few_replicates_note,
    html_report,
    markdown_table,
    ordered,
    study_tables,
    summary_text,
    text_table,
    with_mcse,
)
from stackdr.reporting._tables import PaperTable, latex, markdown

__all__ = [
    "ESTIMATOR_ORDER",
    "FIGURES",
    "SECTIONS",
    "PaperTable",
    "few_replicates_note",
    "html_report",
    "latex",
    "markdown",
    "markdown_table",
    "ordered",
    "render_figures",
    "study_tables",
    "summary_text",
    "text_table",
    "with_mcse",
    "write_report",
]
