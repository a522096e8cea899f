"""The dense workload: what a trace would have cost with nothing pruned.

Pruning gains are read against it. For every step the dense workload runs
every head of the model (the header's ``model.heads``, else every head id the
trace mentions), every key/value row of the context (``kv_rows``, before token
pruning), every V row, at full key precision in one pass (no LSB recompute).
Query rows: a prefill step has one per context row (each token is a query), a
decode step its own ``q_rows``. Per head, q.K and p.V are each
``q_rows x kv_rows x head_dim`` MACs (common practice; see
``/tests/test_result_fields.py`` for the hand check).
"""


def model_heads(trace):
    """Heads per layer of the unpruned model."""
    model = trace.header.get("model") or {}
    if model.get("heads"):
        return int(model["heads"])
    return max(int(s.heads.max()) for s in trace.steps if len(s.heads)) + 1


def dense_macs(trace):
    """MACs the trace's steps would take with no token, head or value pruning."""
    heads = model_heads(trace)
    total = 0
    for s in trace.steps:
        q = s.kv_rows if s.stage == "prefill" else s.q_rows
        total += 2 * heads * q * s.kv_rows * s.head_dim
    return int(total)
