"""Design-space sweeps: many datapaths x traces, on local cores or a Dask cluster.

* :mod:`.spec` -- the sweep spec (YAML): base config, axes, linked groups,
  traces, ``keep_if`` rules, objectives; validated on load;
* :mod:`.constraints` -- the declarative rule language of ``keep_if``;
* :mod:`.plan` -- grid expansion into keyed points;
* :mod:`.worker` -- the work of one point, the same on every backend;
* :mod:`.backends` -- serial, local process pool, Dask distributed;
* :mod:`.store` -- the output folder that loses nothing (SQLite table + compressed records);
* :mod:`.objectives` -- objectives and their screening bounds;
* :mod:`.pareto` -- the Pareto front (one implementation, used everywhere);
* :mod:`.frame` -- the store as pandas DataFrames (:func:`load_sweep`);
* :mod:`.runner` -- ties them together; :func:`run_sweep` is the entry point.

    >>> from sim.sweep import run_sweep
    >>> run = run_sweep("arch_configs/sweeps/decode_array_vs_buffers.yaml", "out/sweep1")
    >>> run.summary["pareto"]
"""

from .constraints import DERIVED
from .objectives import OBJECTIVES
from .pareto import dominated, pareto_mask
from .plan import Plan, PlannedPoint, make_plan, point_key
from .runner import SweepRun, format_run, run_sweep, summarize
from .spec import Spec, SweepError, load_spec, validate_spec
from .store import Store, StoreReader, open_store
from .worker import build_id, run_point

__all__ = ["DERIVED", "OBJECTIVES", "Plan", "PlannedPoint", "Spec", "Store", "StoreReader", "SweepError",
           "SweepRun", "build_id", "dominated", "format_run", "load_spec", "make_plan", "open_store",
           "pareto_mask", "point_key", "run_point", "run_sweep", "summarize", "validate_spec"]
