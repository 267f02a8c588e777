"""What people look at: sky plots, progress feedback, and (later) tables and reports.

Modules are imported on their own (``matcher.report.skyplot``,
``matcher.report.progress``) so that a progress bar does not pull in matplotlib.
"""

__all__: list[str] = []
