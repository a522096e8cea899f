"""A sweep folder as pandas DataFrames: one row per point, the store's columns.

Columns (the same as ``points.csv`` and the store's table, see
:mod:`sim.sweep.store` and :mod:`sim.columns`): ``key``, ``plan_order``,
``trace``, ``status``, ``error``; ``config.<path>`` for the design's main
knobs and every knob the spec sets; ``derived.*``; then the run's figures --
``cycles``, ``seconds``, DRAM traffic, bounds, ``energy.total_pj``,
``area.total_mm2``, the verdict, and per unit the state fractions
``units.<unit>.{busy,starved,blocked,idle}`` and its two largest stall causes
``units.<unit>.stall1`` / ``stall1_fraction`` / ``stall2`` / ``stall2_fraction``.

Rows are read in chunks straight into numpy arrays, so loading takes memory
for the frame asked for (filter and pick columns to keep it small), not for
every record in the store. Whole records (config, full result document) stay
compressed in the store until asked for: :meth:`Sweep.record`.

    >>> import sim
    >>> df = sim.load_sweep("sweeps/run1")
    >>> fast = sim.load_sweep("sweeps/run1", filters=[("trace", "==", "synth_decode"), ("cycles", "<", 1e5)])
    >>> front = sim.open_sweep("sweeps/run1").front_frame()
"""

import numpy as np

from . import objectives as obj
from .store import open_store

CHUNK = 16384


def _column_array(kind, n):
    return np.empty(n, dtype=np.float64 if kind in ("int", "float") else object)


def _finish(kind, arr):
    """Numpy array -> pandas column: ints stay whole numbers (nullable when a point has none)."""
    import pandas as pd

    if kind == "int":
        missing = np.isnan(arr)
        if not missing.any():
            return arr.astype(np.int64)
        return pd.arrays.IntegerArray(np.where(missing, 0, arr).astype(np.int64), missing)
    if kind == "any":   # config knobs: numbers or text, as the config has them
        return pd.Series(arr, dtype=object).infer_objects().array
    return arr


class Sweep:
    """A sweep folder opened for reading (:func:`open_sweep`); close it, or use it in ``with``."""

    def __init__(self, folder):
        self.store = open_store(folder)
        self.folder = folder

    @property
    def columns(self):
        """The table's column names, in order (``key`` first)."""
        return list(self.store.names)

    def __len__(self):
        return self.store.count()

    def frame(self, columns=None, filters=None):
        """A :class:`pandas.DataFrame` of the points matching every ``(column, op, value)`` filter.

        ``op`` is one of ``== != < <= > >= in``, ``not in``; ``columns``
        picks columns (default: all). Rows come in the order points finished.
        """
        import pandas as pd

        names = self.columns if columns is None else list(columns)
        kinds = [self.store.kinds.get(c, "text") for c in names]
        with self.store.snapshot():      # the count and the rows agree while a run appends
            n = self.store.count(filters)
            arrays = [_column_array(k, n) for k in kinds]
            at = 0
            for block in self.store.rows(names, filters, chunk=CHUNK):
                m = len(block)
                for j, (kind, col) in enumerate(zip(kinds, zip(*block))):
                    if kind in ("int", "float"):
                        arrays[j][at:at + m] = np.array(col, dtype=np.float64)   # None -> NaN
                    else:
                        arrays[j][at:at + m] = col
                at += m
        data = {c: _finish(k, a) for c, k, a in zip(names, kinds, arrays)}
        return pd.DataFrame(data, columns=names, copy=False)

    def objectives(self):
        """The objectives the sweep's summary uses (resolved as :func:`sim.sweep.summarize` does)."""
        requested = (self.store.meta.get("spec") or {}).get("objectives") or ["cycles"]
        ok = self.store.count([("status", "==", "ok")]) > 0
        used, _notes = obj.resolve_by(requested, ok,
                                      lambda n: self.store.any_missing(obj.OBJECTIVES[n].column))
        return used

    def front_keys(self, objectives=None, trace=None):
        """``{trace: [key, ...]}``: each trace's Pareto front over ``objectives`` (default: the sweep's)."""
        used = objectives or self.objectives()
        unknown = [o for o in used if o not in obj.OBJECTIVES]
        if unknown:
            raise KeyError(f"unknown objective {unknown[0]!r}; expected one of {', '.join(obj.OBJECTIVES)}")
        cols = [obj.OBJECTIVES[o].column for o in used]
        traces = [trace] if trace is not None else self.store.traces()
        return {t: [k for k, _v in self.store.front(t, cols)] for t in traces}

    def front_frame(self, objectives=None, trace=None, columns=None):
        """The Pareto points of every trace (or of ``trace``) as a DataFrame, in front order."""
        import pandas as pd

        keys = [k for ks in self.front_keys(objectives, trace).values() for k in ks]
        parts = [self.frame(columns, [("key", "in", keys[i:i + 500])]) for i in range(0, len(keys), 500)]
        if not parts:
            return self.frame(columns, [("key", "in", [])])
        df = pd.concat(parts, ignore_index=True) if len(parts) > 1 else parts[0]
        rank = {k: i for i, k in enumerate(keys)}
        return df.iloc[np.argsort([rank[k] for k in df["key"]], kind="stable")].reset_index(drop=True)

    def record(self, key):
        """The whole stored record of point ``key`` (config, result document...), decompressed."""
        return self.store.record(key)

    def records(self, filters=None):
        """Iterate over whole records, one decompressed at a time."""
        return self.store.records(filters)

    def close(self):
        self.store.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def open_sweep(folder):
    """Open a sweep folder for reading: a :class:`Sweep`."""
    return Sweep(folder)


def load_sweep(folder, columns=None, filters=None):
    """A :class:`pandas.DataFrame` with one row per point of sweep folder ``folder``.

    ``filters`` (a list of ``(column, op, value)``, all must hold) and
    ``columns`` are applied while reading, so a filtered frame of a large store
    costs memory only for the rows it keeps.
    """
    with Sweep(folder) as sw:
        return sw.frame(columns, filters)
