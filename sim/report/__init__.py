"""Reports: comparison tables, verdicts, measured sensitivity, figures, Markdown and HTML, timeline export.

Downstream of everything else: reads result documents and sweep folders,
never the other way round. Sensitivity reruns go through the sweep worker
and backends, like any sweep point.
"""
