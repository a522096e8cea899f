"""The workload side: trace format, synthetic traces, pruning policies, capture."""

from .format import FORMAT_VERSION, STAGES, Step, Trace, Work, make_step, new_header, validate
from .files import load_trace, save_trace

__all__ = ["FORMAT_VERSION", "STAGES", "Step", "Trace", "Work", "load_trace", "make_step", "new_header",
           "save_trace", "validate"]
