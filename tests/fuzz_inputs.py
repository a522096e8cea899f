"""Bad inputs for the command line, made from a seed, and a runner that classifies what happened.

Shared by ``tests/test_fuzz_inputs.py`` (a few hundred cases chosen by
hypothesis) and ``bench/fuzz.py`` (thousands, with counts per category).

A case is ``make_case(category, seed, folder)``: it writes its files into
``folder`` and returns the argv of one ``attnsim`` command. Cases built to be
invalid carry ``must_refuse=True``: the contract is exit status 2 and one line
on stderr. The others (random byte flips, truncations) may happen to be valid;
for them the contract is only "no traceback, no hang".

Every case is our own invention, derived from the bundled configs, traces,
policies, presets and sweep specs by a seeded ``random.Random``.
"""

import contextlib
import copy
import io
import json
import os
import random
import re
import signal
import traceback
import zipfile

import numpy as np
import yaml

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

CATEGORIES = ("config", "extends", "preset", "trace_yaml", "trace_npz", "policy", "sweep", "set",
              "outputs", "argv", "file_kind")


def repo(*parts):
    return os.path.join(ROOT, *parts)


class Case:
    """One command line and what it must do."""

    def __init__(self, category, seed, argv, must_refuse, note):
        self.category = category
        self.seed = seed
        self.argv = [str(a) for a in argv]
        self.must_refuse = must_refuse
        self.note = note

    def __repr__(self):
        return f"Case({self.category}, seed={self.seed}, {self.note}: attnsim {' '.join(self.argv)[:300]})"


# --------------------------------------------------------------------------
# Values that no field of the kind at hand accepts


HUGE = [2 ** 41, 2 ** 62, 2 ** 63, 2 ** 64, 10 ** 19, 10 ** 30, -(2 ** 63)]


def bad_for(value, rng):
    """A replacement for ``value`` that is invalid wherever a value of its kind is expected."""
    if isinstance(value, bool):
        return rng.choice([0, 1, "yes", "no", "on", None, 1.5, [], {"a": 1}, "true "])
    if isinstance(value, int):
        return rng.choice([-1, -7, 1.5, 1e300, -1e300, "abc", "", True, None, [], [[1]], {"a": 1},
                           float("nan"), float("inf"), "1_000"] + HUGE)
    if isinstance(value, float):
        return rng.choice([-1.0, -1e-9, 1e300, 1e30, float("nan"), float("inf"), float("-inf"),
                           "abc", True, None, [], {"a": 1}, [[0.5]]])
    if isinstance(value, str):
        return rng.choice([123, -1, 1.5, True, None, [], {"a": 1}, [["x"]], 2 ** 64])
    if isinstance(value, list):
        return rng.choice([{"a": 1}, -5, "abc", True, [[[[1]]]], [None], [float("nan")], [-1] * 3,
                           [2 ** 63], [[2 ** 64]]])
    if isinstance(value, dict):
        return rng.choice([5, "abc", [1, 2], True, 1.5, [[]]])
    return rng.choice([[[1]], {"a": 1}, -1])


def _leaves(node, path=(), skip=()):
    """Every (path, value) below ``node``; subtrees whose key is in ``skip`` are free-form."""
    out = []
    if isinstance(node, dict):
        for k, v in node.items():
            if k in skip:
                continue
            out.append((path + (k,), v))
            out.extend(_leaves(v, path + (k,), skip))
    elif isinstance(node, list):
        for i, v in enumerate(node[:50]):
            out.append((path + (i,), v))
            out.extend(_leaves(v, path + (i,), skip))
    return out


def _mappings(node, path=(), skip=()):
    out = []
    if isinstance(node, dict):
        out.append(path)
        for k, v in node.items():
            if k not in skip:
                out.extend(_mappings(v, path + (k,), skip))
    elif isinstance(node, list):
        for i, v in enumerate(node[:50]):
            out.extend(_mappings(v, path + (i,), skip))
    return out


def _get(node, path):
    for p in path:
        node = node[p]
    return node


def mutate_tree(doc, rng, skip=()):
    """``(doc', note)``: one value replaced by an invalid one, or an unknown key added."""
    doc = copy.deepcopy(doc)
    if rng.random() < 0.25:
        maps = _mappings(doc, skip=skip)
        where = rng.choice(maps)
        key = rng.choice(["zz_unknown", "colour", "Name", "multiplers", "stepz", "header2"])
        _get(doc, where)[key] = rng.choice([1, "x", [1], {"a": 1}])
        return doc, f"unknown key {'.'.join(map(str, where + (key,)))}"
    leaves = _leaves(doc, skip=skip)
    path, value = rng.choice(leaves)
    new = bad_for(value, rng)
    _get(doc, path[:-1])[path[-1]] = new
    return doc, f"{'.'.join(map(str, path))} = {new!r}"[:120]


def dump(doc):
    return yaml.safe_dump(doc, sort_keys=False, allow_unicode=True)


# --------------------------------------------------------------------------
# Text-level damage (applies to every YAML input)


def alias_bomb(levels=9, fan=9):
    lines = ["a0: &a0 [x, x, x, x, x, x, x, x, x]"]
    for i in range(1, levels):
        lines.append(f"a{i}: &a{i} [" + ", ".join([f"*a{i - 1}"] * fan) + "]")
    return "\n".join(lines) + "\n"


def damage_text(text, rng):
    """``(text', must_refuse, note)``; ``text`` is a valid YAML mapping document."""
    kind = rng.choice(["non_utf8", "deep_list", "deep_map", "duplicate", "alias_bomb", "python_tag",
                       "undefined_alias", "syntax", "flip", "truncate", "yaml11_bool", "huge_doc",
                       "tab", "multi_doc", "not_mapping", "nul"])
    lines = text.splitlines()
    if kind == "non_utf8":
        pos = rng.randrange(len(text) + 1)
        data = text[:pos].encode() + bytes([rng.choice([0xE9, 0xFF, 0xC3, 0x80, 0xFE])]) + text[pos:].encode()
        return data, True, "non-UTF-8 byte"
    if kind == "deep_list":
        n = rng.choice([200, 1000, 3000, 20000])
        return text + "zz_deep: " + "[" * n + "]" * n + "\n", True, f"{n} nested lists"
    if kind == "deep_map":
        n = rng.choice([200, 1000, 3000])
        return text + "zz_deep: " + "{a: " * n + "1" + "}" * n + "\n", True, f"{n} nested mappings"
    if kind == "duplicate":
        tops = [ln for ln in lines if ln and not ln[0].isspace() and not ln.startswith("#") and ":" in ln]
        if tops:
            ln = rng.choice(tops)
            key = ln.split(":", 1)[0]
            return text + f"\n{key}: {rng.choice(['1', 'x', '[1]', '{}'])}\n", True, f"duplicate key {key}"
        return text + "\nzz: 1\nzz: 2\n", True, "duplicate key zz"
    if kind == "alias_bomb":
        return text + "\n" + alias_bomb(rng.choice([6, 8, 9])), True, "alias expansion"
    if kind == "python_tag":
        tag = rng.choice(["!!python/object/apply:os.system [true]", "!!python/name:os.system",
                          "!!binary aGVsbG8=", "!!set {a, b}", "!custom 1"])
        return text + f"\nzz_tag: {tag}\n", True, "tag"
    if kind == "undefined_alias":
        return text + "\nzz: *nowhere\n", True, "undefined alias"
    if kind == "syntax":
        bad = rng.choice(["key: [1, 2", "key: {a: 1", "- a\nb: 1", "key: 'open", 'key: "\\q"',
                          "a: b: c", "? [1]\n: 2", "key: `1`", "%YAML 9.9\n---\na: 1"])
        return text + "\n" + bad + "\n", True, "syntax"
    if kind == "flip":
        data = bytearray(text.encode())
        for _ in range(rng.randint(1, 4)):
            i = rng.randrange(len(data))
            data[i] = rng.randrange(32, 127)
        return bytes(data), False, "flipped bytes"
    if kind == "truncate":
        return text[:rng.randrange(1, max(2, len(text)))], False, "truncated"
    if kind == "yaml11_bool":
        return text + "\nzz_flag: " + rng.choice(["yes", "no", "on", "off", "y"]) + "\n", True, "unknown key, YAML 1.1 bool"
    if kind == "huge_doc":
        return text + "\nzz_big: '" + "x" * (rng.choice([3, 20]) * 1024 * 1024) + "'\n", True, "huge document"
    if kind == "tab":
        return "\t" + text, True, "leading tab"
    if kind == "multi_doc":
        return text + "\n---\na: 1\n", True, "two documents"
    if kind == "not_mapping":
        return rng.choice(["- 1\n- 2\n", "42\n", "'text'\n", "[a, b]\n"]), True, "not a mapping"
    return text.replace(":", ":\x00", 1), True, "NUL character"


# --------------------------------------------------------------------------
# Base documents


def _load(path):
    with open(path, encoding="utf-8") as fh:
        return yaml.safe_load(fh)


def base_config():
    """mid.yaml with its extends resolved by hand (sections merged), so the file stands alone."""
    mem = _load(repo("arch_configs", "memory", "ddr4_3200.yaml"))
    mid = _load(repo("arch_configs", "mid.yaml"))
    mid.pop("extends", None)
    out = copy.deepcopy(mem)
    out.pop("extends", None)
    for k, v in mid.items():
        if isinstance(v, dict) and isinstance(out.get(k), dict):
            out[k].update(v)
        else:
            out[k] = v
    return out


def write(folder, name, data):
    p = os.path.join(folder, name)
    mode = "wb" if isinstance(data, bytes) else "w"
    with open(p, mode, **({} if mode == "wb" else {"encoding": "utf-8"})) as fh:
        fh.write(data)
    return p


def _yaml_case(rng, folder, name, doc, skip=()):
    """Write ``doc`` damaged either as a tree or as text; ``(path, must_refuse, note)``."""
    if rng.random() < 0.55:
        bad, note = mutate_tree(doc, rng, skip)
        # an importance score may be any finite number
        must = not (re.search(r"_scores\.\d+ = ", note) and re.search(r" = -?[0-9.]+(e[-+]?\d+)?$", note)
                    and "e+300" not in note and "e+30" not in note)
        return write(folder, name, dump(bad)), must, note
    data, must, note = damage_text(dump(doc), rng)
    return write(folder, name, data), must, note


TRACE_FREE = ("provenance", "fidelity", "notes")


def _small_trace(folder, rng):
    """A bundled hand-sized trace copied into ``folder``."""
    name = rng.choice(["demo_prefill.yaml", "demo_decode.yaml"])
    with open(repo("traces", name), encoding="utf-8") as fh:
        return write(folder, "t.yaml", fh.read())


def _arch_path():
    return repo("arch_configs", "mid.yaml")


# --------------------------------------------------------------------------
# Categories


def case_config(rng, folder):
    p, must, note = _yaml_case(rng, folder, "a.yaml", base_config(), skip=("overrides",))
    cmd = rng.choice([["arch", "check", p], ["arch", "check", p, "--resolved"],
                      ["run", "--arch", p, "--trace", _small_trace(folder, rng)],
                      ["dram", "probe", p, "--requests", "50", "--loads", "0.5", "--patterns", "random"]])
    return cmd, must, note


def case_extends(rng, folder):
    doc = {"name": "child", "dot": {"multipliers": 512}}
    kind = rng.choice(["empty", "dot", "dir", "missing", "binary", "npz", "cycle", "number", "list",
                       "trace", "deep_chain", "non_utf8", "self", "absolute_dir"])
    must = True
    if kind == "empty":
        doc["extends"] = ""
    elif kind == "dot":
        doc["extends"] = "."
    elif kind == "dir":
        os.mkdir(os.path.join(folder, "sub"))
        doc["extends"] = "sub"
    elif kind == "absolute_dir":
        doc["extends"] = repo("arch_configs")
    elif kind == "missing":
        doc["extends"] = "nowhere.yaml"
    elif kind == "binary":
        write(folder, "b.yaml", bytes(range(256)) * 4)
        doc["extends"] = "b.yaml"
    elif kind == "npz":
        doc["extends"] = repo("traces", "synth_prefill.npz")
    elif kind == "cycle":
        write(folder, "b.yaml", dump({"extends": "a.yaml"}))
        doc["extends"] = "b.yaml"
    elif kind == "self":
        doc["extends"] = "a.yaml"
    elif kind == "number":
        doc["extends"] = rng.choice([1, 2 ** 64, 1.5, True])
    elif kind == "list":
        doc["extends"] = ["mid.yaml"]
    elif kind == "trace":
        doc["extends"] = repo("traces", "demo_prefill.yaml")
    elif kind == "deep_chain":
        n = rng.choice([40, 200, 1200])
        for i in range(n):
            write(folder, f"c{i}.yaml", dump({"extends": f"c{i + 1}.yaml"} if i + 1 < n else {"name": "end"}))
        doc["extends"] = "c0.yaml"
        must = n > 64
    elif kind == "non_utf8":
        write(folder, "b.yaml", b"name: caf\xe9\n")
        doc["extends"] = "b.yaml"
    p = write(folder, "a.yaml", dump(doc))
    return ["arch", "check", p], must, f"extends {kind}"


def case_preset(rng, folder):
    kind = rng.choice(["energy", "area"])
    with open(repo("sim", "costs", "presets", f"{kind}_{'horowitz45' if kind == 'energy' else 'proxy45'}.yaml"),
              encoding="utf-8") as fh:
        doc = yaml.safe_load(fh)
    pp, must, note = _yaml_case(rng, folder, "preset.yaml", doc, skip=("origin", "description", "source",
                                                                        "name"))
    cfg = base_config()
    cfg[kind] = {"preset": pp}
    p = write(folder, "a.yaml", dump(cfg))
    return ["arch", "check", p], must, f"{kind} preset: {note}"


def case_trace_yaml(rng, folder):
    with open(repo("traces", rng.choice(["demo_prefill.yaml", "demo_decode.yaml"])), encoding="utf-8") as fh:
        doc = yaml.safe_load(fh)
    p, must, note = _yaml_case(rng, folder, "t.yaml", doc, skip=TRACE_FREE)
    cmd = rng.choice([["trace", "check", p], ["trace", "info", p], ["trace", "info", "--json", p],
                      ["run", "--arch", _arch_path(), "--trace", p]])
    return cmd, must, note


def _npz_members(folder):
    """The members of a small valid .npz trace, written by the package itself."""
    from sim.trace.files import load_trace, save_trace

    p = os.path.join(folder, "base.npz")
    save_trace(load_trace(repo("traces", "demo_decode.yaml")), p)
    with np.load(p, allow_pickle=False) as z:
        arrays = {k: z[k] for k in z.files}
    os.unlink(p)
    return arrays


def _write_npz(path, arrays, extra=None):
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as zf:
        for k, a in arrays.items():
            buf = io.BytesIO()
            np.lib.format.write_array(buf, np.asarray(a), allow_pickle=False)
            zf.writestr(k + ".npy", buf.getvalue())
        for name, data in (extra or {}).items():
            zf.writestr(name, data)
    return path


def case_trace_npz(rng, folder):
    arrays = _npz_members(folder)
    p = os.path.join(folder, "t.npz")
    names = [k for k in arrays if k != "header"]
    kind = rng.choice(["value", "value", "dtype", "shape", "drop", "extra_array", "extra_text", "folder_entry",
                       "bad_magic", "zip_bomb", "truncate", "header", "header_json", "object", "empty_zip",
                       "not_zip", "huge_header_shape", "two_d"])
    must = True
    extra = None
    note = kind
    if kind == "value":
        k = rng.choice(names)
        a = arrays[k].copy()
        if a.size:
            i = rng.randrange(a.size)
            v = rng.choice([-1, -(2 ** 40), 2 ** 62, 2 ** 41, 10 ** 12]) if a.dtype.kind in "iu" else \
                rng.choice([float("nan"), float("inf")])
            a = a.astype(np.int64) if a.dtype.kind in "iu" else a.astype(np.float64)
            a.flat[i] = v
            note = f"{k}[{i}] = {v}"
            # some positions take any value (a score, a head id below the model's count...)
            must = k not in ("token_scores", "head_scores") or not np.isfinite(v)
        arrays[k] = a
    elif kind == "dtype":
        k = rng.choice(names)
        arrays[k] = arrays[k].astype(rng.choice([np.float64, np.complex64, "U3", np.bool_]))
        note = f"{k} as {arrays[k].dtype}"
        must = not (arrays[k].dtype.kind == "f" and k in ("token_scores", "head_scores"))
    elif kind == "shape":
        k = rng.choice(names)
        arrays[k] = np.concatenate([arrays[k], arrays[k][:1]]) if arrays[k].size else np.zeros(3, arrays[k].dtype)
        note = f"{k} one longer"
        must = k != "kept_k"  # the row pool may hold rows no step reads
    elif kind == "drop":
        k = rng.choice(list(arrays))
        del arrays[k]
        note = f"no {k}"
        must = k not in ("token_scores", "token_scores_off", "head_scores", "kept_v_idx", "kept_v_idx_off")
    elif kind == "extra_array":
        arrays[rng.choice(["extra", "notes", "kept_kk"])] = np.zeros(rng.choice([3, 1000]), np.int64)
    elif kind == "extra_text":
        extra = {"notes.txt": b"hello"}
    elif kind == "folder_entry":
        extra = {"sub/": b""}
    elif kind == "bad_magic":
        extra = {"junk.npy": b"\x93NUMPX" + b"\x00" * 40}
    elif kind == "zip_bomb":
        name = rng.choice(names)
        arrays.pop(name)
        os.link(_zip_bomb(arrays, name), p)
        return ["trace", "check", p], True, f"zip bomb: {name} of {BOMB_ROWS:,} int64 zeros"
    elif kind == "huge_header_shape":
        k = rng.choice(names)
        buf = io.BytesIO()
        np.lib.format.write_array_header_1_0(buf, {"descr": "<i8", "fortran_order": False,
                                                   "shape": (rng.choice([2 ** 40, 10 ** 15]),)})
        arrays.pop(k)
        _write_npz(p, arrays, {k + ".npy": buf.getvalue() + b"\x00" * 64})
        return ["trace", "check", p], True, f"{k} declares a huge shape"
    elif kind == "two_d":
        k = rng.choice(names)
        arrays[k] = np.stack([arrays[k], arrays[k]])
    elif kind == "truncate":
        _write_npz(p, arrays)
        data = open(p, "rb").read()
        write(folder, "t.npz", data[:rng.randrange(1, len(data))])
        return ["trace", "check", p], True, "truncated zip"
    elif kind in ("header", "header_json"):
        hdr = json.loads(arrays["header"].tobytes().decode())
        if kind == "header":
            hdr, note = mutate_tree(hdr, rng, TRACE_FREE)
            arrays["header"] = np.frombuffer(json.dumps(hdr).encode(), np.uint8)
        else:
            arrays["header"] = np.frombuffer(rng.choice([b"{", b"\xff\xfe", b"[1]", b"null", b"1e999"]), np.uint8)
    elif kind == "object":
        arrays.pop("layer")
        buf = io.BytesIO()
        np.lib.format.write_array(buf, np.array([{"a": 1}], dtype=object), allow_pickle=True)
        extra = {"layer.npy": buf.getvalue()}
    elif kind == "empty_zip":
        arrays = {}
    elif kind == "not_zip":
        write(folder, "t.npz", rng.choice([b"", b"PK\x03\x04junk", dump({"header": {}}).encode(), bytes(100)]))
        return ["trace", "check", p], True, "not a zip"
    _write_npz(p, arrays, extra)
    cmd = rng.choice([["trace", "check", p], ["trace", "info", p], ["run", "--arch", _arch_path(), "--trace", p]])
    return cmd, must, note


BOMB_ROWS = 300_000_000        # 2.4 GB of zeros; a few MB compressed
_BOMBS = {}


def _zip_bomb(arrays, name):
    """A valid trace .npz whose member ``name`` inflates to 2.4 GB (made once per process)."""
    import atexit
    import shutil
    import tempfile

    if name not in _BOMBS:
        folder = tempfile.mkdtemp(prefix="attnsim-bomb-")
        atexit.register(shutil.rmtree, folder, True)
        path = os.path.join(folder, f"{name}.npz")
        buf = io.BytesIO()
        np.lib.format.write_array_header_1_0(buf, {"descr": "<i8", "fortran_order": False,
                                                   "shape": (BOMB_ROWS,)})
        with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED, compresslevel=1) as zf:
            for k, a in arrays.items():
                b2 = io.BytesIO()
                np.lib.format.write_array(b2, a, allow_pickle=False)
                zf.writestr(k + ".npy", b2.getvalue())
            with zf.open(name + ".npy", "w", force_zip64=True) as fh:
                fh.write(buf.getvalue())
                chunk = bytes(1 << 22)
                for _ in range(BOMB_ROWS * 8 // len(chunk)):
                    fh.write(chunk)
                fh.write(bytes(BOMB_ROWS * 8 % len(chunk)))
        _BOMBS[name] = path
    return _BOMBS[name]


def case_policy(rng, folder):
    doc = _load(repo("traces", "policies", rng.choice(["moderate.yaml", "fit95.yaml", "dense.yaml",
                                                        "tokens_fit95.yaml"])))
    # sections that default when left out: give them all so every leaf is typed
    doc.setdefault("keys", {"msb_bits": 6, "lsb_bits": 4, "threshold": 0.1})
    p, must, note = _yaml_case(rng, folder, "p.yaml", doc)
    text = write(folder, "text.txt", "A short text of our own for a capture that is never reached.\n")
    out = os.path.join(folder, "out.npz")
    return ["trace", "capture", "--text", text, "--policy", p, "--out", out], must, note


def _spec_doc(folder):
    with open(repo("traces", "demo_decode.yaml"), encoding="utf-8") as fh:
        trace = write(folder, "t.yaml", fh.read())
    return {"name": "fuzz", "description": "one point", "base": _arch_path(), "traces": [trace],
            "fixed": {"engine.grain_rows": 512}, "axes": {"dot.multipliers": [512]},
            "linked": [{"dram.channels": [4], "dram.channel_gbps": [25.6]}],
            "keep_if": [{"le": ["buffers.key_kib", {"mul": ["buffers.value_kib", 2]}]}],
            "objectives": ["cycles"]}


def case_sweep(rng, folder):
    doc = _spec_doc(folder)
    kind = rng.choice(["tree", "tree", "text", "range", "keep_if", "objectives"])
    must = True
    if kind == "tree":
        bad, note = mutate_tree(doc, rng, skip=("description",))
        p = write(folder, "s.yaml", dump(bad))
        if note.startswith("keep_if"):  # a rule's constant may be any finite number
            value = note.split(" = ", 1)[-1]
            must = not re.fullmatch(r"-?[0-9.e+]+", value) or value in ("-1e+300", "1e+300")
    elif kind == "text":
        data, must, note = damage_text(dump(doc), rng)
        p = write(folder, "s.yaml", data)
    elif kind == "range":
        r = rng.choice([{"from": 1, "to": 10 ** 12, "step": 1}, {"from": 1, "to": 2, "step": 5e-324},
                        {"from": 1e-300, "to": 1e300, "factor": 1.0000001}, {"from": 5, "to": 1, "step": 1},
                        {"from": 1, "to": 9, "step": 0}, {"from": 1, "to": 9}, {"from": "a", "to": 9, "step": 1},
                        {"from": 1, "to": float("inf"), "step": 1}, {"from": 512, "to": 512, "step": 1, "x": 1}])
        doc["axes"] = {"dot.multipliers": r}
        note = f"range {r}"
        p = write(folder, "s.yaml", dump(doc))
        must = r != {"from": 512, "to": 512, "step": 1}
    elif kind == "keep_if":
        n = rng.choice([3, 200, 3000])
        rule = rng.choice([None,
                           [{"ge": [{"mul": ["dot.multipliers"] + [1e300] * 3}, 1]}],
                           [{"ge": [{"add": [1e308, 1e308]}, 1]}],
                           [{"eq": [{"mul": [{"literal": "abc"}, 10 ** 12]}, 1]}],
                           [{"le": [{"div": ["dot.multipliers", 0]}, 1]}],
                           [{"lt": [{"literal": "x"}, 1]}]])
        if rule is None:  # nested n deep: written as text (a YAML writer would recurse as deep)
            deep = "{add: [" * n + "buffers.key_kib" + ", 1]}" * n
            doc["keep_if"] = []
            p = write(folder, "s.yaml", dump(doc).replace("keep_if: []", f"keep_if: [{{le: [{deep}, 0]}}]"))
            note = f"keep_if nested {n} deep"
            must = True  # 3 deep removes every point; deeper passes the nesting limit
        else:
            doc["keep_if"] = rule
            note = "keep_if"
            p = write(folder, "s.yaml", dump(doc))
    else:
        doc["objectives"] = rng.choice([[["cycles"]], [{"a": 1}], ["cycles", "cycles"], [], "nope", [None]])
        note = f"objectives {doc['objectives']}"
        p = write(folder, "s.yaml", dump(doc))
    out = os.path.join(folder, "out")
    return ["sweep", p, "--out", out, "--jobs", "1", "--quiet"], must, note


def _knob_values():
    from sim import arch as archmod

    out = []
    for section, fields in archmod.SCHEMA.items():
        for key, f in fields.items():
            out.append((key if not section else f"{section}.{key}", f.default))
    return out


def case_set(rng, folder):
    trace = _small_trace(folder, rng)
    kind = rng.choice(["typed", "typed", "text"])
    if kind == "typed":
        path, default = rng.choice(_knob_values())
        bad = bad_for(default, rng)
        if isinstance(bad, (dict, list)) and path.endswith("overrides"):
            bad = [1]
        text = f"{path}=" + (json.dumps(bad) if not isinstance(bad, str) else bad or "''")
        if isinstance(bad, float) and not np.isfinite(bad):
            text = f"{path}=" + {float("inf"): ".inf", float("-inf"): "-.inf"}.get(bad, ".nan")
    else:
        text = rng.choice(["dot.multipliers=[1", "x=*alias", "clock_ghz=`1`",
                           "name=!!python/object/apply:os.system [true]", "dot.multipliers=", "=5",
                           "dot.multipliers", "dot.multipliers=1e300", "dot.multipliers=1.5",
                           "dram.channels=3", "clock_ghz=1e999", "dot.multipliers=0x10000000000000000",
                           "name=\udcff", "dot.multipliers=" + "[" * 5000, "a.b.c.d=1",
                           "dot.multipliers=1\nname: x", "energy.overrides={zz: 1}", "precision.k_lsb_bits=99"])
    cmd = rng.choice([["run", "--arch", _arch_path(), "--trace", trace, "--set", text],
                      ["dram", "probe", _arch_path(), "--requests", "50", "--loads", "0.5", "--set", text]])
    return cmd, True, f"--set {text[:60]!r}"


def case_outputs(rng, folder):
    trace = _small_trace(folder, rng)
    existing = write(folder, "exists.json", "{}\n")
    os.mkdir(os.path.join(folder, "adir"))
    kind = rng.choice(["missing_folder", "folder", "exists", "same_as_trace", "same_as_arch", "two_outputs",
                       "too_long", "empty", "proc", "sweep_nonempty", "sweep_file", "synth_exists",
                       "probe_exists", "synth_folder"])
    arch = _arch_path()
    run = ["run", "--arch", arch, "--trace", trace]
    if kind == "missing_folder":
        cmd = run + [rng.choice(["--json", "--timeline"]), os.path.join(folder, "no", "such", "r.json")]
    elif kind == "folder":
        cmd = run + [rng.choice(["--json", "--timeline"]), os.path.join(folder, "adir")]
    elif kind == "exists":
        cmd = run + [rng.choice(["--json", "--timeline"]), existing]
    elif kind == "same_as_trace":
        cmd = run + ["--json", trace]
    elif kind == "same_as_arch":
        cmd = ["run", "--arch", write(folder, "a.yaml", open(arch).read().replace("extends: memory/",
                                      "extends: " + repo("arch_configs", "memory") + "/")),
               "--trace", trace]
        cmd += [rng.choice(["--json", "--timeline"]), cmd[2], "--force"]
    elif kind == "two_outputs":
        p = os.path.join(folder, "same.json")
        cmd = run + ["--json", p, "--timeline", p]
    elif kind == "too_long":
        cmd = run + ["--json", os.path.join(folder, "x" * 300 + ".json")]
    elif kind == "empty":
        cmd = run + [rng.choice(["--json", "--timeline"]), ""]
    elif kind == "proc":
        cmd = run + ["--json", "/proc/attnsim-fuzz/out.json"]
    elif kind == "sweep_nonempty":
        d = os.path.join(folder, "full")
        os.mkdir(d)
        write(d, "mine.txt", "not a sweep\n")
        spec = write(folder, "s.yaml", dump(_spec_doc(folder)))
        cmd = ["sweep", spec, "--out", d, "--jobs", "1", "--quiet"]
    elif kind == "sweep_file":
        spec = write(folder, "s.yaml", dump(_spec_doc(folder)))
        cmd = ["sweep", spec, "--out", existing, "--jobs", "1", "--quiet"]
    elif kind == "synth_exists":
        p = write(folder, "old.npz", b"precious")
        cmd = ["trace", "synth", "--out", p, "--prompt", "8", "--decode", "1", "--layers", "1", "--heads", "1"]
    elif kind == "synth_folder":
        cmd = ["trace", "synth", "--out", os.path.join(folder, "adir"), "--prompt", "8", "--decode", "1"]
    else:
        cmd = ["dram", "probe", arch, "--requests", "50", "--loads", "0.5", "--csv", existing]
    return cmd, True, f"output {kind}"


ARGV_TEMPLATES = [
    (["run", "--arch", "{arch}", "--trace", "{trace}"], {"--grain-rows": "int", "--seed": "int"}),
    (["trace", "synth", "--out", "{out}", "--prompt", "8", "--decode", "1", "--layers", "2", "--heads", "2"],
     {"--prompt": "int", "--decode": "intpos", "--layers": "int", "--heads": "int", "--head-dim": "int",
      "--seed": "int", "--value-keep": "ratio", "--lsb-fraction": "ratio0", "--lsb-rows": "ratio",
      "--token-keep": "ratio", "--head-keep": "ratio"}),
    (["dram", "probe", "{arch}", "--requests", "50", "--loads", "0.5"],
     {"--requests": "int", "--stride": "int", "--seed": "int", "--loads": "ratio", "--patterns": "word"}),
    (["arch", "check", "{arch}"], {"--head-dim": "int"}),
    (["sweep", "{spec}", "--out", "{outdir}", "--quiet"], {"--jobs": "int", "--workers": "int"}),
]

BAD_OPTION = {
    "int": ["-1", "abc", "1.5", "", "99999999999999999999999", "1e3", "-99999999999999999999", " ", "0x10"],
    "intpos": ["-1", "abc", "1.5", "", "99999999999999999999999", "1e3"],
    "ratio": ["-1", "nan", "inf", "", "abc", "1e-300", "2", "1e300", "0"],
    "ratio0": ["-1", "nan", "inf", "", "abc", "2", "1e300"],
    "word": ["", ",", "bogus", "random,,bogus", " , "],
}


def case_argv(rng, folder):
    tmpl, opts = rng.choice(ARGV_TEMPLATES)
    fill = {"arch": _arch_path(), "trace": _small_trace(folder, rng), "out": os.path.join(folder, "o.npz"),
            "outdir": os.path.join(folder, "sw")}
    if "{spec}" in tmpl:
        fill["spec"] = write(folder, "s.yaml", dump(_spec_doc(folder)))
    argv = [a.format(**fill) for a in tmpl]
    kind = rng.choice(["bad_value", "bad_value", "bad_value", "unknown_option", "missing_value", "extra_arg",
                       "no_command", "bad_command", "missing_required"])
    if kind == "bad_value":
        opt, typ = rng.choice(sorted(opts.items()))
        val = rng.choice(BAD_OPTION[typ])
        if opt in argv:
            argv[argv.index(opt) + 1] = val
        else:
            argv += [opt, val]
        note = f"{opt} {val!r}"
    elif kind == "unknown_option":
        argv.insert(rng.randrange(1, len(argv) + 1), rng.choice(["--bogus", "--jsn", "-x", "--arch="]))
        note = "unknown option"
    elif kind == "missing_value":
        argv.append(rng.choice(list(opts)))
        note = "option without its value"
    elif kind == "extra_arg":
        argv.append("stray")
        note = "stray argument"
    elif kind == "no_command":
        argv = rng.choice([[], ["trace"], ["arch"], ["dram"]])
        note = "no command"
    elif kind == "bad_command":
        argv = [rng.choice(["rnu", "trace", "arch"]), "bogus"]
        note = "unknown command"
    else:
        req = [a for a in argv if a in ("--arch", "--trace", "--out")]
        if req:
            i = argv.index(rng.choice(req))
            del argv[i:i + 2]
            note = "required option left out"
        else:
            argv = argv[:1]
            note = "arguments left out"
    return argv, True, note


def case_file_kind(rng, folder):
    npz = repo("traces", "synth_prefill.npz")
    cfg = _arch_path()
    tr = repo("traces", "demo_prefill.yaml")
    pol = repo("traces", "policies", "moderate.yaml")
    spec = write(folder, "s.yaml", dump(_spec_doc(folder)))
    fake_npz = write(folder, "fake.npz", open(cfg, encoding="utf-8").read())
    text_yaml = write(folder, "t.yaml", "just words, no mapping at all\n")
    png = write(folder, "pic.yaml", b"\x89PNG\r\n\x1a\n" + bytes(64))
    choices = [
        ["run", "--arch", npz, "--trace", cfg], ["run", "--arch", tr, "--trace", tr],
        ["run", "--arch", cfg, "--trace", cfg], ["run", "--arch", cfg, "--trace", fake_npz],
        ["arch", "check", npz], ["arch", "check", tr], ["arch", "check", repo("arch_configs")],
        ["arch", "check", png], ["arch", "check", "/dev/null"], ["arch", "check", pol],
        ["trace", "check", cfg], ["trace", "info", pol], ["trace", "check", repo("traces")],
        ["trace", "check", text_yaml], ["trace", "check", spec], ["trace", "check", "/dev/null"],
        ["sweep", npz, "--out", os.path.join(folder, "o")], ["sweep", cfg, "--out", os.path.join(folder, "o")],
        ["sweep", repo("arch_configs"), "--out", os.path.join(folder, "o")],
        ["dram", "probe", npz], ["dram", "probe", tr],
        ["trace", "capture", "--text", npz, "--policy", pol, "--out", os.path.join(folder, "o.npz")],
        ["trace", "capture", "--text", tr, "--policy", cfg, "--out", os.path.join(folder, "o.npz")],
        ["trace", "capture", "--text", tr, "--policy", npz, "--out", os.path.join(folder, "o.npz")],
        ["report", npz, "--out", os.path.join(folder, "rep")],
        ["report", cfg, "--out", os.path.join(folder, "rep")],
    ]
    cmd = rng.choice(choices)
    return cmd, True, "wrong kind of file"


MAKERS = {
    "config": case_config, "extends": case_extends, "preset": case_preset, "trace_yaml": case_trace_yaml,
    "trace_npz": case_trace_npz, "policy": case_policy, "sweep": case_sweep, "set": case_set,
    "outputs": case_outputs, "argv": case_argv, "file_kind": case_file_kind,
}


def make_case(category, seed, folder):
    """Write the case's files into ``folder`` (which must exist) and return the :class:`Case`."""
    rng = random.Random(f"{category}:{seed}")
    argv, must, note = MAKERS[category](rng, folder)
    return Case(category, seed, argv, must, note)


# --------------------------------------------------------------------------
# Running one case in this process


class CaseTimeout(BaseException):
    """Raised by the alarm: a BaseException, so no ``except Exception`` swallows it."""


class Outcome:
    """What one case did: ``kind`` is one of OUTCOMES."""

    def __init__(self, kind, code, out, err, detail=""):
        self.kind = kind
        self.code = code
        self.out = out
        self.err = err
        self.detail = detail

    def __repr__(self):
        return f"Outcome({self.kind}, exit {self.code}, stderr={self.err[-600:]!r}, {self.detail[-1500:]})"


OUTCOMES = ("refused", "accepted", "traceback", "hang", "multiline", "other_exit")


def _alarm(_signum, _frame):
    raise CaseTimeout()


def run_case(case, timeout=20.0):
    """Call ``sim.cli.main(case.argv)`` here, with stdout/stderr captured and an alarm."""
    from sim.cli import main

    out, err = io.StringIO(), io.StringIO()
    old = signal.signal(signal.SIGALRM, _alarm)
    signal.setitimer(signal.ITIMER_REAL, timeout)
    code, detail, kind = None, "", None
    try:
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            code = main(case.argv)
    except CaseTimeout:
        kind = "hang"
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
    except BaseException:  # noqa: BLE001 - the point is to see every escape
        kind, detail = "traceback", traceback.format_exc()
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)
    o, e = out.getvalue(), err.getvalue()
    if kind is None:
        if "Traceback (most recent call last)" in e:
            kind, detail = "traceback", e
        elif code == 2:
            lines = e.strip().splitlines()
            kind = "refused" if len(lines) == 1 and lines[0].startswith("attnsim: error: ") else "multiline"
        elif code == 0:
            kind = "accepted"
        else:
            kind = "other_exit"
    return Outcome(kind, code, o, e, detail)


def listing(folder):
    """Every path under ``folder`` with its size and mtime (to see what a command wrote).

    Folders are listed by name only: checking that an output folder takes a
    new file creates and removes a temporary file, which touches the folder's
    mtime but leaves nothing behind.
    """
    out = {}
    for dirpath, dirnames, filenames in os.walk(folder):
        for n in dirnames:
            out[os.path.relpath(os.path.join(dirpath, n), folder) + "/"] = None
        for n in filenames:
            p = os.path.join(dirpath, n)
            try:
                st = os.lstat(p)
            except OSError:
                continue
            out[os.path.relpath(p, folder)] = (st.st_size, st.st_mtime_ns)
    return out
