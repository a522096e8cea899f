"""What a datapath costs besides time: energy and an area proxy, from named technology tables.

Below the config loader (``sim/arch.py`` checks a config's ``energy`` and
``area`` sections against their presets when it loads) and below the result
document, which prices a finished run with them. Nothing here runs the engine.
"""
