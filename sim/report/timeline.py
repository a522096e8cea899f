"""Timeline export: per-unit busy and stall intervals in the Trace Event Format.

The Trace Event Format is an open JSON format (a ``traceEvents`` list of
complete events ``ph: "X"`` with ``ts`` / ``dur`` in microseconds, and
metadata events ``ph: "M"`` naming the tracks), so a run's timeline opens in
any trace viewer a user already has. One track per unit; the DRAM pool gets
one track per channel showing when its data bus was busy.

:func:`read_timeline` reads such a file back into the intervals
:class:`sim.result.Result` carries, which is how ``attnsim report`` can draw a
timeline from ``attnsim run --timeline`` output without simulating again.
"""

import json

from ..errors import InputError

DRAM_TID = 100  # DRAM channel tracks start here so unit tracks keep small ids


def timeline_events(result):
    """The Trace Event Format document of a run (a dict ready for ``json.dump``)."""
    doc = result.to_dict() if hasattr(result, "to_dict") else result
    intervals = result.intervals
    clock_ghz = doc["arch"]["config"]["clock_ghz"]
    us = 1.0 / (clock_ghz * 1e3)  # microseconds per cycle
    label = f"{doc['arch']['name']} x {doc['trace']['name']}"
    events = [{"name": "process_name", "ph": "M", "pid": 1, "args": {"name": f"attnsim: {label}"}}]
    tid = 0
    for name, ivs in intervals.items():
        if name == "dram":
            for ch, chan in enumerate(ivs):
                events.append({"name": "thread_name", "ph": "M", "pid": 1, "tid": DRAM_TID + ch,
                               "args": {"name": f"dram channel {ch}"}})
                for t0, t1 in chan:
                    events.append({"name": "transfer", "cat": "busy", "ph": "X", "pid": 1,
                                   "tid": DRAM_TID + ch, "ts": t0 * us, "dur": (t1 - t0) * us})
            continue
        tid += 1
        events.append({"name": "thread_name", "ph": "M", "pid": 1, "tid": tid, "args": {"name": name}})
        for t0, t1, state, cause in ivs:
            ev = {"name": state if not cause else f"{state}: {cause}", "cat": state, "ph": "X", "pid": 1,
                  "tid": tid, "ts": t0 * us, "dur": (t1 - t0) * us}
            if cause:
                ev["args"] = {"cause": cause}
            events.append(ev)
    return {"traceEvents": events, "displayTimeUnit": "ns",
            "otherData": {"producer": "attnsim", "simulator_version": doc["simulator"]["version"],
                          "arch": doc["arch"]["name"], "trace": doc["trace"]["name"],
                          "trace_digest": doc["trace"]["digest"], "clock_ghz": clock_ghz,
                          "cycles": doc["cycles"]}}


def write_timeline(result, path):
    """Write the run's per-unit intervals to ``path`` (Trace Event Format JSON)."""
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(timeline_events(result), fh)


def read_timeline(path):
    """``(info, intervals)`` from a file :func:`write_timeline` wrote.

    ``intervals`` has the shape of ``Result.intervals`` (cycles): per unit
    ``[t0, t1, state, cause]`` lists, and ``intervals["dram"]`` per channel
    ``[t0, t1]`` lists. ``info`` is the file's ``otherData``.
    """
    try:
        with open(path, encoding="utf-8") as fh:
            data = json.load(fh)
    except FileNotFoundError:
        raise InputError(path, "<file>", path, "file not found") from None
    except json.JSONDecodeError as exc:
        raise InputError(path, f"line {exc.lineno}", "...", f"not valid JSON ({exc.msg})") from None
    info = data.get("otherData") if isinstance(data, dict) else None
    if not isinstance(info, dict) or info.get("producer") != "attnsim" or "clock_ghz" not in info:
        raise InputError(path, "otherData", info, "expected a timeline written by attnsim run --timeline")
    per_cycle = info["clock_ghz"] * 1e3  # cycles per microsecond
    names, units, dram = {}, {}, {}
    for ev in data.get("traceEvents", []):
        if ev.get("ph") == "M" and ev.get("name") == "thread_name":
            names[ev["tid"]] = ev["args"]["name"]
    for ev in data.get("traceEvents", []):
        if ev.get("ph") != "X":
            continue
        t0 = ev["ts"] * per_cycle
        t1 = t0 + ev["dur"] * per_cycle
        tid = ev["tid"]
        if tid >= DRAM_TID:
            dram.setdefault(tid - DRAM_TID, []).append([t0, t1])
        else:
            cause = (ev.get("args") or {}).get("cause")
            units.setdefault(names.get(tid, str(tid)), []).append([t0, t1, ev["cat"], cause])
    if dram:
        units["dram"] = [dram.get(c, []) for c in range(max(dram) + 1)]
    return info, units
