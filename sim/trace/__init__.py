"""The workload side: trace format, synthetic traces, pruning policies, capture."""

from .format import (FORMAT_VERSION, STAGES, Step, Trace, Work, load_trace, make_step, new_header,
                     save_trace, validate)

__all__ = ["FORMAT_VERSION", "STAGES", "Step", "Trace", "Work", "load_trace", "make_step", "new_header",
           "save_trace", "validate"]
