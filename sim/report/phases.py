"""Refresh phases: how far a run's answer moves with where it starts in the DRAM refresh schedule.

Where a run starts in the refresh schedule is arbitrary. On a trace of a few
refresh intervals one window more or less on a critical fetch can move the
cycles by more than a design change does, so a report asked for it
(``attnsim report --refresh-phases``) simulates each trace's two fastest runs
again with ``dram.refresh_phase`` moved by 0.25, 0.5 and 0.75 of tREFI (through
the same reruns as the sensitivity, :func:`sim.report.sensitivity.measure`),
and sets each run's ``phase_range`` (its fewest and most cycles),
``phase_spread``: how far apart they come, and the means over the phases
(``phase_mean_s``, ``phase_mean_pj``). The
verdicts then call a latency lead inside that spread a tie
(:mod:`sim.report.verdict`). Nothing here is estimated. The same option has a short run's
sensitivity measured at the four phases, by the means (:func:`sim.report.sensitivity.measure`).
"""

import copy

from ..run import AUTO_PHASES
from .inputs import group_key
from .sensitivity import Variant, _config_of
from .verdict import latency_key

# the places after the run as recorded, in tREFI: the same four a sweep's refresh_phases: auto takes
PHASES = tuple(k / AUTO_PHASES for k in range(1, AUTO_PHASES))
_PLACES = ", ".join(f"{p:g}" for p in (0.0,) + PHASES[:-1]) + f" and {PHASES[-1]:g}"   # "0, 0.25, 0.5 and 0.75"
LEADERS = 2          # runs per trace measured: the fastest and the one it is compared with
RESOURCE = "refresh phase"


def leaders(runs, n=LEADERS):
    """Each trace's ``n`` fastest runs (in the order of ``runs``), by :func:`latency_key`."""
    groups = {}
    for r in runs:
        groups.setdefault(group_key(r), []).append(r)
    out = set()
    for rr in groups.values():
        # the runs the verdicts will compare, so ranked as they rank: by the means where a sweep
        # gave every run of the trace them (the runs as configured may be misleadingly placed)
        key, _ = latency_key(rr)
        out.update(id(r) for r in sorted(rr, key=key)[:n])
    return [r for r in runs if id(r) in out]


def plan_phases(run):
    """The run as recorded, then at each of :data:`PHASES` later in the refresh schedule
    (none when its memory takes no refresh)."""
    base = _config_of(run)
    out = [Variant(run, "baseline", "as recorded")]
    out[0].config = base
    dram = base.get("dram", {})
    if dram.get("model", "banked") != "banked":
        return out
    old = float(dram.get("refresh_phase", 0.0))
    for p in PHASES:
        v = Variant(run, RESOURCE, f"+{p:g}", "dram.refresh_phase", old, (old + p) % 1.0)
        v.config = copy.deepcopy(base)
        v.config.setdefault("dram", {})["refresh_phase"] = v.new
        out.append(v)
    return out


def measure(runs, **backend):
    """Measure the refresh-phase spread of each trace's leading runs; sets ``run.phase_spread``
    and returns notes (one per run measured)."""
    from . import sensitivity as S

    picked = leaders(runs)
    if not picked:
        return []
    table, notes = S.measure(picked, plan=plan_phases, what="refresh-phase reruns", **backend)
    for r in picked:
        ok = [row for row in table.get(id(r), ()) if row["cycles"] is not None]
        if not ok:
            continue
        # each row's speedup is the baseline rerun's cycles over its own: that gives the baseline's
        cycles = [row["cycles"] for row in ok] + [round(ok[0]["cycles"] * ok[0]["speedup"])]
        lo, hi = min(cycles), max(cycles)
        r.phase_range, r.phase_spread = (lo, hi), (hi - lo) / lo
        if r.doc["cycles"]:   # a run's latency is its cycles over its clock
            r.phase_mean_s = sum(cycles) / len(cycles) * r.doc["seconds"] / r.doc["cycles"]
        energy = [row["energy_pj"] for row in ok]   # and the baseline's from its energy ratio, as above
        if all(energy) and ok[0]["energy_ratio"]:
            energy.append(ok[0]["energy_pj"] / ok[0]["energy_ratio"])
            r.phase_mean_pj = sum(energy) / len(energy)
        notes.append(f"Refresh phase: {r.label} takes {lo:,} to {hi:,} cycles with the run starting "
                     f"{_PLACES} of tREFI later in the refresh schedule ({r.phase_spread:.1%} "
                     f"apart); a lead inside that is reported as a tie.")
    return notes
