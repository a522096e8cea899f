"""Planning a step: which rule cuts it.

A step every query row of which sees every kept key is cut by the tiling rule
(:mod:`sim.engine.tiling`); a causal, windowed or per-K/V-head-keys step by
the banded rule (:mod:`sim.engine.band`). Either way the result is one
:class:`~sim.engine.tiling.GroupPlan` per K/V head, with its query blocks.
"""

from .band import BandPlanner
from .tiling import GroupPlan, plan_plain_group, chunk_rows, query_block_rows


def plan_step(arch, amap, step, grain_rows, layer=None, lazy_over=None):
    """Cut one step into head-group plans (see the module docstring).

    ``layer``: the DRAM region the step's rows live in (default its layer; the
    engine gives each request its own). ``lazy_over``: a banded step whose
    blocks would stream more chunks than this is left to be planned block by
    block (each group's ``band``, its ``blocks`` empty); None plans every step whole.
    """
    layer = step.layer if layer is None else layer
    d = step.head_dim
    groups_of = step.kv_groups()
    qb = query_block_rows(arch, d, step.q_rows, max(len(i) for i in groups_of.values()))
    q_pos = step.query_positions()
    blocks = [q_pos[b:b + qb] for b in range(0, step.q_rows, qb)]
    kc = chunk_rows(arch, "K", d, grain_rows)
    vc = chunk_rows(arch, "V", d, grain_rows)
    # LSB recompute chunks pair one KL chunk with one MSB chunk: same rows, both must fit
    klc = min(kc, chunk_rows(arch, "KL", d, grain_rows)) if arch.precision.k_lsb_bits > 0 else kc
    cuts = (kc, vc, klc)
    heads = step.heads.tolist()
    keys_of = step.kv_keys()
    groups, bands = [], []
    same_cut = {}   # the groups' cuts: heads that keep the same rows are cut alike
    for kv, idx in groups_of.items():
        idx = idx.tolist()
        gp = GroupPlan([heads[j] for j in idx], kv)
        gp.select = step.stage == "decode"
        if step.plain:
            plan_plain_group(arch, amap, step, layer, gp, idx, blocks, cuts, same_cut)
        else:
            bands.append(BandPlanner(arch, amap, step, layer, gp, idx, keys_of[kv], blocks, cuts))
        groups.append(gp)
    lazy = bands and lazy_over is not None and sum(b.chunks_estimate() for b in bands) > lazy_over
    for band in bands:
        if lazy:
            band.gp.band = band
        else:
            band.gp.blocks = [band.plan(b) for b in range(len(band))]
    return groups
