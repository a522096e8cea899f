"""The dense workload: what a trace would have cost with nothing pruned.

Pruning gains are read against it. For every step the dense workload runs
every query head of the model (the header's ``model.heads``, else every head
id the trace mentions), every key/value row of the context (``kv_rows``,
before token pruning), every V row, at full key precision in one pass (no LSB
recompute). Query rows: a prefill step has one per context row (each token is
a query), a decode step its own ``q_rows``. The attention pattern is the
model's, not pruning, so it stays: a causal or windowed step sees what its
rule lets it see. Counted with the trace's own :meth:`Step.work` on the dense
step, so the rules are the ones the engine's work counts follow.
"""

from ..trace.step import make_step


def model_heads(trace):
    """Query heads per layer of the unpruned model."""
    model = trace.header.get("model") or {}
    if model.get("heads"):
        return int(model["heads"])
    return max(int(s.heads.max()) for s in trace.steps if len(s.heads)) + 1


def dense_macs(trace):
    """MACs (q.K + p.V) the trace's steps would take with no token, head or value pruning."""
    heads = model_heads(trace)
    total = 0
    for s in trace.steps:
        q = s.kv_rows if s.stage == "prefill" else s.q_rows
        w = make_step(s.layer, s.stage, s.head_dim, heads, q, s.kv_rows, causal=s.causal,
                      window=s.window).work()
        total += w.qk_macs + w.pv_macs
    return int(total)
