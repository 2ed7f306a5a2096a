"""The report stage: findings -> one report model -> renderers.

:func:`build_report` makes the neutral model (:mod:`audit.report.model`);
:mod:`audit.report.format` is the one number formatter every renderer uses.
"""

from .build import build_report, figures_from_files
from .model import Report

__all__ = ["build_report", "figures_from_files", "Report"]
