"""Reports: comparison tables, figures, Markdown and HTML, timeline export.

Downstream of everything else: reads result documents and sweep folders,
never the other way round.
"""
