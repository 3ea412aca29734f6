"""Per-run report: report.html with held-out comparisons, error map, turntable, curves and config."""

from featuretex.report.html import write_report

__all__ = ["write_report"]
