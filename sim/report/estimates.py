"""Sampled runs in a report: each trace's runs ranked by the whole trace's estimated latency.

A run made with ``attnsim run --sample-prefill K`` or ``--sample-decode K`` simulated
part of its trace; every figure of its document but the whole trace's estimate (the
``prefill_sample`` or ``decode_sample`` section) is the part's. Ranked by those figures,
a report would compare the parts, which differ with K and, in prefill, with each
config's query block rows. So a report with a sampled run among its inputs ranks every
run of a trace by the whole trace's latency -- a whole run's own, a sampled run's
estimate -- and says which leads the sampling can tell apart.

How far an estimate may be off, its *reach*, comes from what the sampling benches
measured (``bench/prefill_conclusions.py``, ``bench/sample_conclusions.py``) and from the
run's own checks: at least :data:`sim.result.SAMPLE_NOISY` (estimates whose checks
agreed within it came within 1 % of their whole runs), the run's spreads where larger,
and :data:`sim.result.SAMPLE_FEW_LAYERS_OFF` for a decode-sampled run of fewer than
:data:`sim.result.SAMPLE_FEW_LAYERS` layers. A lead no larger than the reach of either
run is not told apart. A prefill-sampled run on a datapath with separate q.K and p.V
arrays is not ranked at all: there a block's time depends on the blocks before it, and
estimates came up to 33 % off (2.3 % with both checks under 1 %); nor is one whose softmax
unit paces the array (:func:`sim.result.softmax_paces`: up to 6.1 % high with both checks
under 1 %).
"""

from .. import formats as fm
from ..columns import estimate_section
from ..result import SAMPLE_FEW_LAYERS, SAMPLE_FEW_LAYERS_OFF, SAMPLE_NOISY, SOFTMAX_PACED_OFF, softmax_paces
from .verdict import TIE

SUFFIX = "-sampled"


def is_sampled(doc):
    """Whether ``doc`` is the run of part of its trace (either sampling; a prefill sampling that
    left nothing out made the whole trace)."""
    return estimate_section(doc) is not None


def whole_trace(doc):
    """``(name, digest)`` of the trace the run estimates. A prefill-sampled run's document
    names the trace with ``-sampled`` added (its digest is the whole trace's); a
    decode-sampled part is a trace of its own, and its ``decode_sample`` section names the
    whole (a document written before it did keeps the part's name and digest)."""
    name, digest = doc["trace"]["name"], doc["trace"]["digest"]
    ds = doc.get("decode_sample")
    if ds is not None:
        return ds.get("whole_trace_name", name), ds.get("whole_trace_digest", digest)
    if doc.get("prefill_sample") is not None and name.endswith(SUFFIX):
        return name[:-len(SUFFIX)], digest
    return name, digest


def sampling_tag(doc):
    """``prefill 1 in 8, decode 1 in 8 after 32``: how the run sampled its trace ('' if whole)."""
    parts = []
    ps, ds = doc.get("prefill_sample"), doc.get("decode_sample")
    if ps is not None:
        parts.append(f"prefill 1 in {ps['every']}")
    if ds is not None:
        parts.append(f"decode 1 in {ds['every']} after {ds['warmup_tokens']}")
    return ", ".join(parts)


class Estimate:
    """A run's whole-trace latency as the report ranks it.

    ``cycles`` and ``seconds``: the whole trace's (estimated, for a sampled run);
    ``made``: what was simulated, in words; ``reach``: the share either side within which
    the estimate is not told apart from another (for a whole run the full report's tie margin,
    :data:`sim.report.verdict.TIE`, or its refresh-phase spread); ``caveats``: why the
    reach is what it is, or why the run is not ranked (``ranked`` False).
    """

    __slots__ = ("cycles", "seconds", "made", "reach", "caveats", "ranked", "spreads")

    def __init__(self, run):
        d = run.doc
        self.caveats, self.ranked, self.spreads = [], True, {}
        est = estimate_section(d)
        if est is None:
            self._whole(run)
            return
        self.cycles, self.seconds, self.reach = est["cycles"], est["seconds"], 0.0
        self.made = ", ".join(filter(None, (self._prefill(d), self._decode(d))))
        worst = max(self.spreads.values(), default=0.0)
        self.reach = max(self.reach, SAMPLE_NOISY, worst)
        if worst > SAMPLE_NOISY:
            which = max(self.spreads, key=self.spreads.get)
            self.caveats.append(f"its {which} came {worst:.1%} either side of the estimate")

    def _whole(self, run):
        """A run of the whole trace: its own latency (the mean over refresh phases where it was
        run at several, as a full report ranks it); its reach the full report's tie margin, or
        their spread where larger."""
        d = run.doc
        self.cycles, self.seconds, self.made = d["cycles"], d["seconds"], "whole trace"
        self.reach = max(TIE, run.phase_spread)   # the tie margin of any report
        if run.phase_mean_s is not None:
            ph = d["refresh_phases"]
            self.seconds = run.phase_mean_s
            self.cycles = ph.get("mean_cycles") or round(run.phase_mean_s * d["cycles"] / d["seconds"])
            self.caveats.append(f"the mean of its runs at {len(ph['cycles'])} places in the refresh "
                                f"schedule, {run.phase_spread:.1%} apart")

    def _prefill(self, d):
        """The prefill sampling's part of the estimate: what it made, its checks, whether to rank."""
        ps = d.get("prefill_sample")
        if ps is None or not ps.get("sampled_steps"):
            return ""
        self.spreads["prefill copies"] = ps.get("copy_spread", 0.0)
        self.spreads["prefill half-samples"] = ps.get("half_sample_spread", 0.0)
        if d["arch"]["config"]["dot"]["arrays"] == "separate":
            self.ranked = False
            self.caveats.append("prefill sampled with a q.K and a p.V array of their own, where a block's "
                                "time depends on the blocks before it (such estimates came up to 33 % off): "
                                "not ranked, compare by whole runs")
        elif softmax_paces(d):
            self.ranked = False
            self.caveats.append(f"prefill sampled where the softmax unit paces the array, where a block's time "
                                f"depends on the blocks around it (such estimates came up to "
                                f"{SOFTMAX_PACED_OFF:.1%} high with both checks agreeing): not ranked, "
                                "compare by whole runs")
        return f"{ps['simulated_query_blocks']:,} of {ps['query_blocks']:,} query blocks"

    def _decode(self, d):
        """The decode sampling's part: what it made, its check, the few-layers reach."""
        ds = d.get("decode_sample")
        if ds is None:
            return ""
        self.spreads["decode half-samples"] = ds.get("half_sample_spread", 0.0)
        layers = len(d["per_layer_cycles"])
        if layers < SAMPLE_FEW_LAYERS:
            self.reach = max(self.reach, SAMPLE_FEW_LAYERS_OFF)
            self.caveats.append(f"decode sampled on {layers} layer{'s' if layers > 1 else ''}, where such "
                                f"estimates came up to {SAMPLE_FEW_LAYERS_OFF:.1%} off with their half-samples "
                                f"agreeing (below {SAMPLE_FEW_LAYERS} layers)")
        return f"{ds['simulated_decode_steps']:,} of {ds['decode_steps']:,} decode steps"


def rank(group):
    """``[(run, estimate, slower, told_apart)]`` for one trace's runs, fastest estimate first:
    ``slower`` is the run's estimated latency over the fastest ranked run's (None for a run
    not ranked), ``told_apart`` whether that lead is larger than the reach of both runs."""
    est = [(r, Estimate(r)) for r in group]
    ranked = sorted((x for x in est if x[1].ranked), key=lambda x: x[1].seconds)
    out = []
    if ranked:
        best_r, best = ranked[0]
        out.append((best_r, best, 1.0, True))
        for r, e in ranked[1:]:
            slower = e.seconds / best.seconds if best.seconds else None
            apart = slower is not None and slower - 1 > max(e.reach, best.reach)
            out.append((r, e, slower, apart))
    out += [(r, e, None, False) for r, e in sorted((x for x in est if not x[1].ranked),
                                                    key=lambda x: x[1].seconds)]
    return out


def verdict(ranked):
    """What a design review may conclude from one trace's ranked runs, in a few sentences."""
    if not ranked or not ranked[0][1].ranked:
        return "No run of this trace can be ranked by its estimate: compare these designs by whole runs."
    best_r, best = ranked[0][0], ranked[0][1]
    text = [f"Fastest: {best_r.config_label} ({'estimated ' if best.made != 'whole trace' else ''}"
            f"{fm.show(best.seconds, 'latency')})."]
    tied = [r.config_label for r, e, slower, apart in ranked[1:] if e.ranked and not apart]
    if tied:
        text.append(f"Not told apart from it: {', '.join(tied)} (each lead inside the reach of one of the two "
                    "runs; compare these by whole runs, at several refresh phases where that is the reach).")
    ahead = [(r, slower) for r, e, slower, apart in ranked[1:] if e.ranked and apart]
    if ahead:
        text.append("Slower: " + ", ".join(f"{r.config_label} {fm.show(slower, 'speedup')}"
                                           for r, slower in ahead) + ".")
    out = [r.config_label for r, e, _s, _a in ranked if not e.ranked]
    if out:
        text.append(f"Not ranked: {', '.join(out)} (see the table).")
    return " ".join(text)
