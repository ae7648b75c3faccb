"""Report: matplotlib figures (object API, Agg canvas) and the session summary.

Import the submodules (``assistant.report.images``, ``assistant.report.summary``); matplotlib is imported only
inside this package, and only when a submodule is imported.
"""

from typing import Any

__all__ = ["ReportResult", "build_report"]


def __getattr__(name: str) -> Any:  # lazy, so importing the package alone does not load matplotlib
    if name in __all__:
        from assistant.report import summary

        return getattr(summary, name)
    raise AttributeError(f"module 'assistant.report' has no attribute {name!r}")
