"""The written verdicts: what limits each run, what to change, how the runs compare.

Every sentence reads a measurement: the classification of
:func:`sim.limits.verdict_of` (the same the table, the terminal summary and
the roofline figure read), the roofline fraction, the measured sensitivity
reruns when the report made them, and the energy section. Comparisons follow
one rule: a run is "fastest" (or "least energy") only when it beats every
other comparable run by more than :data:`TIE`; otherwise the runs within
:data:`TIE` of the best are named as tied. For latency the margin is wider where
the runs' cycles were measured to move more than that with where they start in
the DRAM refresh schedule (``Run.phase_spread``): a lead inside that spread may
be where the refresh windows fell.
"""

from operator import attrgetter

from .. import formats as fm
from ..limits import UNIT_TEXT, cause_text, verdict_of

TIE = 0.01   # relative difference under which two runs are tied
FULL_VERDICTS = 10   # a group larger than this gets full verdicts for its best runs only

LEVER = {
    "dot": "more multipliers (dot.multipliers)",
    "dot_pv": "more multipliers (dot.multipliers)",
    "softmax": "more softmax lanes (softmax.lanes)",
    "topk": "more comparators (topk.comparators)",
}


def _first_upper(text):
    """``text`` with its first letter raised (``str.capitalize`` would lower the rest: p.V)."""
    return text[:1].upper() + text[1:]


def limiting_unit(doc):
    """The unit the classification names (the critical unit when the limit is a wait)."""
    v = verdict_of(doc)
    return v["resource"] if v["limit"] in ("compute", "unit") else v["critical_unit"]


def limit_text(doc):
    """One or two sentences on what limits the run, from the classification."""
    v = verdict_of(doc)
    u = doc["units"]
    kind, res, crit = v["limit"], v["resource"], v["critical_unit"]
    pct = fm.pct
    if kind in ("compute", "unit"):
        busy = u[res]["busy"]
        lanes = v.get("lanes") if kind == "compute" else None
        out = (f"{_first_upper(UNIT_TEXT.get(res, res))} limits it: {res} is busy {pct(busy)} of the run"
               + (", saturated" if busy >= 0.85 else ""))
        if lanes and v.get("lane_underuse"):
            dims = ", ".join(map(str, lanes["head_dims"]))
            return out + (f", but its multipliers do useful work only {pct(lanes['utilization'].get(res, 0.0))} "
                          f"of the run: head width {dims} fills {pct(lanes['fill'])} of its {lanes['lanes']} "
                          "lanes in a pass (lane under-use). Lanes matched to the head width (dot.lanes) would do "
                          f"the same work in fewer cycles, as would {LEVER[res]}.")
        out += f"; {LEVER.get(res, 'a faster ' + res)} would shorten it."
        if lanes:
            out += f" Its multipliers do useful work {pct(lanes['utilization'].get(res, 0.0))} of the run."
        return out
    share = pct(v["share"])
    crit = f"{crit}, the busiest compute unit,"
    if kind == "memory_bandwidth":
        return (f"DRAM bandwidth limits it: {crit} waits on memory {share} of its time while the pool delivers "
                f"{pct(v['dram_share_of_peak'])} of its peak; more bandwidth (dram.channels, "
                "dram.channel_gbps) or less traffic would shorten it.")
    if kind == "memory_latency":
        return (f"Memory latency limits it: {crit} waits on memory {share} of its time (mostly "
                f"{cause_text(res)}) while DRAM delivers only {pct(v['dram_share_of_peak'])} of its peak on "
                "average: the waits are access latency, queueing and the transfer time of single transactions, "
                "not a saturated pool; more requests in flight or issuing ahead (fetch.inflight, "
                "fetch.issue_window) would hide more of it.")
    if kind == "buffer":
        return (f"Buffer room limits it: {crit} waits {share} of its time on {cause_text(res)}; a larger "
                "buffer or limit would let the memory run further ahead.")
    return (f"A dependency limits it: {crit} waits {share} of its time on {cause_text(res)}, results that "
            "must be ready before the next work can start; more of a resource alone does not remove it"
            + (" (an issue window lets the fetch unit work past such waits)." if res in ("softmax", "topk")
               else "."))


def close_text(doc):
    """A sentence when a second limit is within a few points of the first, else ''."""
    v = verdict_of(doc)
    c = v.get("close_to")
    if not c:
        return ""
    return (f"{_first_upper(c['label'])} comes close behind ({fm.pct(c['share'])} of the critical unit's "
            f"time against {fm.pct(v['share'])}): the two limit the run about equally, and a small change "
            "of either can swap them.")


def roofline_text(doc):
    v = verdict_of(doc)
    rf, bound = v["roofline_fraction"], v["bound"]
    if rf >= 0.8:
        return (f"It runs at {fm.pct(rf)} of its closed-form {bound}-bound roofline: little is left to win "
                f"without raising the {bound} peak.")
    return f"It reaches {fm.pct(rf)} of its closed-form {bound}-bound roofline."


def inside_phase_spread(speedup, spread):
    """Whether a measured speed-up (or slow-down) is within ``spread``, how far the run moves
    with where it starts in the refresh schedule (none when that is within :data:`TIE`)."""
    return spread > TIE and 1 / (1 + spread) <= speedup <= 1 + spread


def sensitivity_text(sens, spread=0.0):
    """The measured best change for one run, from its sensitivity rows (see :mod:`.sensitivity`),
    and what refresh costs it where that was measured (:func:`refresh_cost_text`); ``spread``: the
    run's refresh-phase spread, when measured (a gain inside it is said to be)."""
    if not sens:
        return ""
    bounds = [s for s in sens if s.get("direction") == "bound"]
    n = max(s.get("phases", 1) for s in sens)
    if n > 1:   # means over the phases: the spread of one run is not their uncertainty
        spread = 0.0
    text = _best_change_text([s for s in sens if s.get("direction") != "bound"], spread)
    if n > 1 and text:
        text = text[:-1] + f" (means over {n} refresh phases)."
    cost = refresh_cost_text(bounds)
    return f"{text} {cost}" if text and cost else text or cost


def refresh_cost_text(bounds):
    """What refresh costs a run: its rerun with refresh off, when that is more than :data:`TIE` faster.
    The stall split cannot say it (a burst held by a refresh window waits as any memory access does)."""
    off = next((s for s in bounds if s.get("speedup") is not None), None)
    if off is None or off["speedup"] <= 1 + TIE:
        return ""
    return (f"Refresh costs it {fm.show(off['speedup'], 'speedup')}: with refresh off it takes "
            f"{off['cycles']:,} cycles; the stall split counts that time as memory waits, and no refresh "
            f"policy can gain more.")


def _best_change_text(sens, spread):
    if not sens:
        return ""
    ok = [s for s in sens if s.get("speedup") is not None]
    if not ok:
        return "No sensitivity rerun succeeded."
    best = max(ok, key=lambda s: s["speedup"])
    if best["speedup"] <= 1 + TIE:
        return (f"No single change of the {len(ok)} measured buys more than {TIE:.0%}: the best, "
                f"{best['change']}, gives {fm.show(best['speedup'], 'speedup')}.")
    tied = sorted((s for s in ok if s["speedup"] >= best["speedup"] / (1 + TIE)), key=lambda s: -s["speedup"])
    if len(tied) > 1:
        return (f"Measured best changes, tied within {TIE:.0%}: "
                + "; ".join(f"{s['change']} ({s['setting']}) {fm.show(s['speedup'], 'speedup')} faster"
                            + (f" at {fm.show(s['energy_ratio'], 'speedup')} the energy"
                               if s.get("energy_ratio") is not None else "") for s in tied) + ".")
    text = (f"Measured best change: {best['change']} ({best['setting']}) makes it "
            f"{fm.show(best['speedup'], 'speedup')} faster")
    if best.get("energy_ratio") is not None:
        text += f" at {fm.show(best['energy_ratio'], 'speedup')} the energy"
    if inside_phase_spread(best["speedup"], spread):
        text += (f", inside the {spread:.0%} this run moves with where it starts in the refresh schedule: "
                 f"not a gain this trace can show")
    return text + "."


def energy_text(doc):
    e = doc.get("energy")
    if not e or not e.get("total_pj"):
        return ""
    top = max(e["units_pj"], key=e["units_pj"].get)
    share = e["units_pj"][top] / e["total_pj"]
    what = "DRAM traffic" if top == "dram" else UNIT_TEXT.get(top, "the " + top.replace("_", " "))
    out = f"Energy {fm.show(e['total_pj'], 'energy')}"
    if "static_pj" in e:
        out += f" ({fm.pct(e['static_pj'] / e['total_pj'])} static leakage)"
    out += f"; {what} takes {fm.pct(share)} of it."
    return out


def write_verdict(run, peers=(), sensitivity=None):
    """A short paragraph for ``run``; ``peers``: comparable runs; ``sensitivity``: its measured reruns."""
    d = run.doc
    parts = [limit_text(d), close_text(d), roofline_text(d),
             sensitivity_text(sensitivity, run.phase_spread), rank_text(run, peers), energy_text(d)]
    return " ".join(p for p in parts if p)


def _ranked(runs, key, tie=TIE):
    """``(best, tied, ranked)``: runs sorted by ``key``; ``tied`` those within ``tie`` of the best."""
    ranked = sorted(runs, key=key)
    lo = key(ranked[0])
    tied = [r for r in ranked if key(r) <= lo * (1 + tie)]
    return ranked[0], tied, ranked


def _latency_tie(runs):
    """The margin under which latencies are tied: :data:`TIE`, or the runs' refresh-phase
    spread where it is wider; and the words that say why."""
    spread = max(r.phase_spread for r in runs)
    if spread <= TIE:
        return TIE, ""
    return spread, " (how far these runs move with where they start in the refresh schedule)"


def _seconds(r):
    return r.doc["seconds"]


# the run's mean latency over the refresh phases, seconds (latency: the configs' clocks differ)
_mean_seconds = attrgetter("phase_mean_s")


def _by_means(runs, attr, own):
    """``(key, words)``: the run's ``attr`` (a mean over the refresh phases) when every run has one, else ``own``."""
    if all(getattr(r, attr) is not None for r in runs):
        return attrgetter(attr), " on average over the refresh phases"
    return own, ""


def latency_key(runs):
    """``(key, words)``: a group whose every run was measured at the refresh phases (a sweep run
    with ``refresh_phases``) is ranked by the means, as the sweep ranked it; else by each run."""
    return _by_means(runs, "phase_mean_s", _seconds)


def _energy(r):   # 0 without an energy section: a front of such runs goes by latency
    return r.doc.get("energy", {}).get("total_pj", 0.0)


def energy_key(runs):
    """``(key, words)``: the energy per run as :func:`latency_key` ranks latency: by the means
    over the refresh phases where every run of the group has one, else by each run."""
    return _by_means(runs, "phase_mean_pj", _energy)


def rank_text(run, peers):
    """Where ``run`` stands among ``peers`` on latency (ties are ties)."""
    peers = [p for p in peers if p is not run]
    if not peers:
        return ""
    allr = [run] + peers
    tie, why = _latency_tie(allr)
    key, mean = latency_key(allr)
    best, tied, ranked = _ranked(allr, key, tie)
    if run in tied and len(tied) > 1:
        others = [r.config_label for r in tied if r is not run]
        return f"Tied within {tie:.0%}{why} for fastest with {', '.join(others)}."
    if run is best:
        second = ranked[1]
        return (f"Fastest of the {len(allr)} configs on {run.trace_label}{mean}, "
                f"{fm.show(key(second) / key(run), 'speedup')} ahead of {second.config_label}.")
    lead = ", ".join(r.config_label for r in tied)
    return (f"{fm.show(key(run) / key(best), 'speedup')} the latency of the fastest{mean} "
            f"({lead}).")


def group_summary(group):
    """The heading sentence of a group of comparable runs: fastest and least energy, ties as ties."""
    if len(group) < 2:
        return ""
    out = []
    tie, why = _latency_tie(group)
    key, mean = latency_key(group)
    best, tied, ranked = _ranked(group, key, tie)
    if len(tied) > 1:
        means = _phase_means(tied if why else ())
        out.append(f"tied within {tie:.0%}{why} for fastest: {', '.join(r.config_label for r in tied)}"
                   + (means or f" ({fm.show(key(best), 'latency')}{mean})"))
    else:
        out.append(f"fastest{mean} {best.config_label} ({fm.show(key(best), 'latency')}, "
                   f"{fm.show(key(ranked[1]) / key(best), 'speedup')} ahead of {ranked[1].config_label})")
    if all(r.doc.get("energy", {}).get("total_pj") for r in group):
        ekey, emean = energy_key(group)
        low, tied_e, ranked_e = _ranked(group, ekey)
        if len(tied_e) > 1:
            out.append(f"tied within {TIE:.0%} for least energy{emean}: "
                       f"{', '.join(r.config_label for r in tied_e)}")
        else:
            out.append(f"least energy{emean} {low.config_label} ({fm.show(ekey(low), 'energy')}, "
                       f"{fm.show(ekey(ranked_e[1]) / ekey(low), 'speedup')} less than "
                       f"{ranked_e[1].config_label})")
    return "; ".join(out) + "."


def _phase_means(runs):
    """The mean cycles over the refresh phases of runs tied by their phase spread, when every one
    was measured at the phases: what each takes on average, wherever a run starts."""
    if not runs or any(r.phase_mean_s is None for r in runs):
        return ""

    return (", on average over the refresh phases: "
            + ", ".join(f"{r.config_label} {fm.show(_mean_seconds(r), 'latency')}"
                        for r in sorted(runs, key=_mean_seconds)))


def grouped_verdicts(groups, sensitivity=None, front=None):
    """``[(title, summary, [(run, verdict)], [others])]`` per group, runs sorted by latency (by the
    means over the refresh phases where every run has one, :func:`latency_key`).

    A group of more than :data:`FULL_VERDICTS` runs gets full verdicts for the
    runs in ``front(group)`` (its Pareto points) and the fastest ones up to
    that number; the rest are listed in ``others`` (a short line each).
    """
    sensitivity = sensitivity or {}
    out = []
    for key, group in groups.items():
        lkey, mean = latency_key(group)
        ranked = sorted(group, key=lkey)
        if len(ranked) > FULL_VERDICTS:
            keep = list(front(ranked)) if front else []
            for r in ranked:
                if len(keep) >= FULL_VERDICTS:
                    break
                if r not in keep:
                    keep.append(r)
            full = [r for r in ranked if r in keep]
            rest = [r for r in ranked if r not in keep]
        else:
            full, rest = ranked, []
        title = (f"{ranked[0].trace_label} ({len(ranked)} run{'s' if len(ranked) > 1 else ''}, sorted by latency"
                 f"{mean})")
        verdicts = [(r, write_verdict(r, group, sensitivity.get(id(r)))) for r in full]
        out.append((title, group_summary(ranked), verdicts, rest))
    return out


def short_line(run):
    """One line for a run outside the full verdicts: latency, limit, energy (with the means over
    the refresh phases beside them where the run has them, which its group may be ranked by)."""
    d = run.doc
    text = f"{fm.show(d['seconds'], 'latency')}"
    if run.phase_mean_s is not None:
        text += f" (mean over refresh phases {fm.show(run.phase_mean_s, 'latency')})"
    text += f", {verdict_of(d)['label']}"
    if d.get("energy"):
        text += f", {fm.show(d['energy']['total_pj'], 'energy')}"
        if run.phase_mean_pj is not None:
            text += f" (mean {fm.show(run.phase_mean_pj, 'energy')})"
    return text
