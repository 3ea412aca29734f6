"""Per-run report: report.html (verdict, deliverables, the model in 3D, details, the error map on the
object and in texture space, held-out comparisons, curves, config) and its pictures."""

from featuretex.report.html import write_report

__all__ = ["write_report"]
