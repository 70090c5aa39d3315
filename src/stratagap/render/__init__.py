"""Rendering a result: the verdict, the plain-text summary, tables, output files and the report.

Renderers read an :class:`~stratagap.result.AnalysisResult` (or its ``to_dict()``); they never
recompute a statistic. The report loads matplotlib, so it is imported only when used.
"""
