"""The one way attnsim reads YAML: configs, extends targets, presets, policies,
sweep specs, YAML traces and ``--set`` values.

Everything a file can do wrong becomes an :class:`~sim.errors.InputError` of
the caller's class, one line naming the file, the place and what was expected:

* the path is a folder, a device or missing; the file is larger than the kind
  allows; it is binary (an ``.npz`` trace, an image: said by kind);
* the bytes are not UTF-8 (the byte offset, line and column are named);
* the YAML is malformed (line and column), holds more than one document,
  nests deeper than :data:`MAX_DEPTH`, has aliases that expand to more than
  :data:`MAX_NODES` nodes, repeats a key in one mapping, or carries a tag
  other than the plain ones.

Scalars follow the YAML 1.2 core schema: ``1e9`` and ``3.9e3`` are numbers,
``yes``/``no``/``on``/``off`` are text, ``0o17`` and ``0x1f`` are integers,
``.inf``/``.nan`` are floats, dates are text. The reader also returns the line
of every key and list item (:class:`Document`), so a loader can say where a
bad value sits.
"""

from __future__ import annotations

import math
import os
import re
import stat
from typing import Any, Callable

import yaml

from .errors import NO_VALUE

MAX_DEPTH = 64                 # nested mappings/lists; no input of ours needs more than 8
MAX_NODES = 2_000_000          # scalars + collections after alias expansion
MAX_BYTES = 4 << 20            # configs, policies, presets, sweep specs
MAX_TRACE_BYTES = 256 << 20    # YAML traces (large traces belong in .npz)

_BASE: Any = getattr(yaml, "CSafeLoader", yaml.SafeLoader)

# What a file's first bytes say it is, when it is not text.
_MAGIC = (
    (b"PK\x03\x04", "a zip archive (an .npz trace?)"),
    (b"PK\x05\x06", "an empty zip archive"),
    (b"\x93NUMPY", "a numpy .npy array"),
    (b"\x89PNG", "a PNG image"),
    (b"%PDF", "a PDF document"),
    (b"\x1f\x8b", "a gzip file"),
    (b"\x7fELF", "an executable"),
    (b"SQLite format 3\x00", "an SQLite database"),
)


class Document:
    """A parsed YAML file: ``data`` plus the line of each key or item by path.

    ``lines[("dot", "multipliers")]`` is the 1-based line of that key; a list
    item's path ends with its index.
    """

    def __init__(self, data: Any, lines: dict, source: str):
        self.data = data
        self.lines = lines
        self.source = source

    def line_of(self, path) -> int | None:
        """The line of a dotted path (``"dot.multipliers"``) or a tuple; the nearest known parent."""
        parts = tuple(_split_path(path)) if isinstance(path, str) else tuple(path)
        while parts:
            if parts in self.lines:
                return self.lines[parts]
            parts = parts[:-1]
        return None


def _split_path(path: str):
    """``steps[3].kept_k`` -> ``("steps", 3, "kept_k")``."""
    for part in path.split("."):
        m = re.fullmatch(r"([^\[\]]*)((?:\[\d+\])*)", part)
        if not m:
            yield part
            continue
        if m.group(1):
            yield m.group(1)
        for idx in re.findall(r"\[(\d+)\]", m.group(2)):
            yield int(idx)


# --------------------------------------------------------------------------
# YAML 1.2 core schema on top of the safe loader


class _Loader(_BASE):
    """The safe loader with YAML 1.2 core-schema scalars and no duplicate keys."""


_Loader.yaml_implicit_resolvers = {}
_IMPLICIT = (
    ("tag:yaml.org,2002:null", r"^(?:~|null|Null|NULL|)$", "~nN"),
    ("tag:yaml.org,2002:bool", r"^(?:true|True|TRUE|false|False|FALSE)$", "tTfF"),
    ("tag:yaml.org,2002:int", r"^(?:[-+]?[0-9]+|0o[0-7]+|0x[0-9a-fA-F]+)$", "-+0123456789"),
    ("tag:yaml.org,2002:float",
     r"^(?:[-+]?(?:\.[0-9]+|[0-9]+(?:\.[0-9]*)?)(?:[eE][-+]?[0-9]+)?|[-+]?\.(?:inf|Inf|INF)|\.(?:nan|NaN|NAN))$",
     "-+0123456789."),
)
for _tag, _rx, _first in _IMPLICIT:
    _Loader.add_implicit_resolver(_tag, re.compile(_rx), list(_first))


def _int12(loader, node):
    text = loader.construct_scalar(node)
    if text.startswith("0o"):
        return int(text[2:], 8)
    if text.startswith("0x"):
        return int(text[2:], 16)
    return int(text, 10)


def _float12(loader, node):
    text = loader.construct_scalar(node).lower()
    if text.endswith(".inf"):
        return -math.inf if text.startswith("-") else math.inf
    if text == ".nan":
        return math.nan
    return float(text)


def _bool12(loader, node):
    return loader.construct_scalar(node).lower() == "true"


class _DuplicateKey(yaml.YAMLError):
    def __init__(self, key, mark, first_line):
        self.key, self.problem_mark, self.first_line = key, mark, first_line
        super().__init__(f"key {key!r} appears twice")


class _UnknownTag(yaml.YAMLError):
    def __init__(self, tag, mark):
        self.tag, self.problem_mark = tag, mark
        super().__init__(f"tag {tag}")


def _mapping(loader, node, deep=False):
    out, seen = {}, {}
    for key_node, value_node in node.value:
        key = loader.construct_object(key_node, deep=True)
        try:
            hash(key)
        except TypeError:
            raise _UnknownTag("a list or mapping used as a key", key_node.start_mark) from None
        if key in seen:
            raise _DuplicateKey(key, key_node.start_mark, seen[key])
        seen[key] = key_node.start_mark.line + 1
        out[key] = loader.construct_object(value_node, deep=deep)
    return out


def _mapping_gen(loader, node):
    data = {}
    yield data
    data.update(_mapping(loader, node))


def _refuse_tag(loader, node):
    raise _UnknownTag(node.tag, node.start_mark)


_Loader.yaml_constructors = dict(_Loader.yaml_constructors)
_Loader.yaml_multi_constructors = {}
_Loader.add_constructor("tag:yaml.org,2002:int", _int12)
_Loader.add_constructor("tag:yaml.org,2002:float", _float12)
_Loader.add_constructor("tag:yaml.org,2002:bool", _bool12)
_Loader.add_constructor("tag:yaml.org,2002:map", _mapping_gen)
for _t in ("tag:yaml.org,2002:timestamp", "tag:yaml.org,2002:binary", "tag:yaml.org,2002:set",
           "tag:yaml.org,2002:omap", "tag:yaml.org,2002:pairs"):
    _Loader.yaml_constructors.pop(_t, None)
_Loader.add_constructor(None, _refuse_tag)


# --------------------------------------------------------------------------
# Reading


def _a(what: str) -> str:
    return ("an " if what[:1].lower() in "aeiou." else "a ") + what


def check_file(path, error, what: str) -> os.stat_result:
    """``path`` names an existing regular file (not a folder, device or pipe), or ``error``."""
    path = os.fspath(path)
    if path == "":
        raise error("<input>", "<file>", path, f"expected the path of {_a(what)}, got an empty name")
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise error(path, "<file>", path, "file not found") from None
    except OSError as exc:
        raise error(path, "<file>", path, f"cannot be read ({exc.strerror or exc})") from None
    if stat.S_ISDIR(st.st_mode):
        raise error(path, "<file>", path, f"is a folder, expected {_a(what)} file")
    if not stat.S_ISREG(st.st_mode):
        raise error(path, "<file>", path, f"is not a regular file (a device or pipe), expected {_a(what)} file")
    return st


def read_bytes(path, error, what: str, max_bytes: int = MAX_BYTES) -> bytes:
    """The bytes of a regular file ``path``; folders, devices, missing and oversized files refused."""
    path = os.fspath(path)
    st = check_file(path, error, what)
    if st.st_size > max_bytes:
        raise error(path, "<file>", f"{st.st_size:,} bytes",
                    f"expected {_a(what)} of at most {max_bytes:,} bytes")
    try:
        with open(path, "rb") as fh:
            return fh.read(max_bytes + 1)
    except OSError as exc:
        raise error(path, "<file>", path, f"cannot be read ({exc.strerror or exc})") from None


def kind_of_bytes(data: bytes) -> str | None:
    """What binary ``data`` looks like ("a zip archive (an .npz trace?)"), or None for text."""
    for magic, kind in _MAGIC:
        if data.startswith(magic):
            return kind
    if b"\x00" in data[:8192]:
        return "a binary file"
    return None


def decode_text(data: bytes, source: str, error, what: str) -> str:
    """UTF-8 text of ``data`` (a byte-order mark is dropped); binary data refused by kind."""
    kind = kind_of_bytes(data)
    if kind is not None:
        raise error(source, "<file>", NO_VALUE, f"this looks like {kind}, not {_a(what)} (YAML text)")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        head = data[:exc.start]
        line = head.count(b"\n") + 1
        col = exc.start - (head.rfind(b"\n") + 1) + 1
        raise error(source, f"byte {exc.start}", f"0x{data[exc.start]:02x}",
                    f"expected UTF-8 text (column {col})", line=line) from None
    return text[1:] if text.startswith("\ufeff") else text


def _check_events(text: str, source: str, error, max_depth: int, max_nodes: int) -> None:
    """Walk the parse events once: nesting depth, alias expansion and document count."""
    stack: list[list[Any]] = []
    sizes: dict[str, int] = {}
    docs = 0
    loader = _Loader(text)
    try:
        while True:
            ev = loader.get_event()
            if ev is None:
                break
            if isinstance(ev, yaml.DocumentStartEvent):
                docs += 1
                if docs > 1:
                    raise error(source, "<yaml>", NO_VALUE, "expected one YAML document, found a "
                                "second one", line=_line(ev.start_mark))
            elif isinstance(ev, (yaml.MappingStartEvent, yaml.SequenceStartEvent)):
                stack.append([1, ev.anchor])
                if len(stack) > max_depth:
                    raise error(source, "<yaml>", NO_VALUE, f"nested deeper than {max_depth} levels",
                                line=_line(ev.start_mark))
            elif isinstance(ev, (yaml.MappingEndEvent, yaml.SequenceEndEvent)):
                n, anchor = stack.pop()
                if anchor is not None:
                    sizes[anchor] = n
                if stack:
                    stack[-1][0] += n
            elif isinstance(ev, yaml.ScalarEvent):
                if ev.anchor is not None:
                    sizes[ev.anchor] = 1
                if stack:
                    stack[-1][0] += 1
            elif isinstance(ev, yaml.AliasEvent):
                if ev.anchor not in sizes:
                    raise error(source, "<yaml>", f"*{ev.anchor}",
                                "alias to an anchor that is not defined before it", line=_line(ev.start_mark))
                if stack:
                    stack[-1][0] += sizes[ev.anchor]
            if stack and stack[-1][0] > max_nodes:
                raise error(source, "<yaml>", NO_VALUE, f"expands to more than {max_nodes:,} values "
                            "(aliases repeat too much)", line=_line(ev.start_mark))
    finally:
        loader.dispose()


def _line(mark) -> int | None:
    return mark.line + 1 if mark is not None else None


def _lines(node, path=(), out=None) -> dict:
    """``{path: line}`` of every key and item below a composed node (depth already bounded)."""
    if out is None:
        out = {}
    if isinstance(node, yaml.MappingNode):
        for k, v in node.value:
            if isinstance(k, yaml.ScalarNode):
                p = path + (_scalar_key(k),)
                out[p] = k.start_mark.line + 1
                _lines(v, p, out)
    elif isinstance(node, yaml.SequenceNode):
        for i, v in enumerate(node.value):
            if isinstance(v, yaml.ScalarNode):
                continue  # a list of numbers points at its key's line (keeps long traces cheap)
            p = path + (i,)
            out[p] = v.start_mark.line + 1
            _lines(v, p, out)
    return out


def _scalar_key(node):
    """The key as the constructor made it (numbers for int/float tags), without a loader."""
    tag, text = node.tag, node.value
    try:
        if tag.endswith(":int"):
            return int(text[2:], 8) if text.startswith("0o") else int(text, 0 if text.startswith("0x") else 10)
        if tag.endswith(":float"):
            return float(text)
        if tag.endswith(":bool"):
            return text.lower() == "true"
        if tag.endswith(":null"):
            return None
    except ValueError:
        pass
    return text


def parse_text(text: str, source: str, error, *, max_depth: int = MAX_DEPTH,
               max_nodes: int = MAX_NODES, want_lines: bool = True) -> Document:
    """Parse one YAML document from ``text``; every YAML problem becomes ``error`` in one line."""
    try:
        text.encode("utf-8")
    except UnicodeEncodeError as exc:
        raise error(source, "<yaml>", NO_VALUE, f"expected UTF-8 text (undecodable character at "
                    f"position {exc.start})") from None
    try:
        _check_events(text, source, error, max_depth, max_nodes)
        loader = _Loader(text)
        try:
            node = loader.get_single_node()
            data = loader.construct_document(node) if node is not None else None
        finally:
            loader.dispose()
        lines = _lines(node) if (want_lines and node is not None) else {}
    except _DuplicateKey as exc:
        raise error(source, exc.key, NO_VALUE, f"key appears twice in one mapping (first on line "
                    f"{exc.first_line})", line=exc.problem_mark.line + 1) from None
    except _UnknownTag as exc:
        raise error(source, "<yaml>", exc.tag, "unsupported YAML tag (only plain values, lists and "
                    "mappings are read)", line=exc.problem_mark.line + 1) from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        problem = getattr(exc, "problem", None) or str(exc).splitlines()[0]
        col = f", column {mark.column + 1}" if mark is not None else ""
        raise error(source, "<yaml>", NO_VALUE, f"not valid YAML ({problem}{col})",
                    line=mark.line + 1 if mark is not None else None) from None
    except RecursionError:  # defensive: depth is bounded above
        raise error(source, "<yaml>", NO_VALUE, f"nested deeper than {max_depth} levels") from None
    return Document(data, lines, source)


def read_document(path, error, what: str, *, max_bytes: int = MAX_BYTES, want_lines: bool = True) -> Document:
    """Read and parse the YAML file ``path`` (a ``what``: "config", "policy", ...)."""
    path = os.fspath(path)
    data = read_bytes(path, error, what, max_bytes)
    text = decode_text(data, path, error, what)
    return parse_text(text, path, error, want_lines=want_lines)


def read_mapping(path, error, expected: str, empty_ok: bool = False, what: str = "YAML file",
                 max_bytes: int = MAX_BYTES) -> dict:
    """The mapping in ``path``; ``error`` (an InputError class) for anything else (``expected``)."""
    return read_mapping_doc(path, error, expected, empty_ok, what, max_bytes).data


def read_mapping_doc(path, error, expected: str, empty_ok: bool = False, what: str = "YAML file",
                     max_bytes: int = MAX_BYTES) -> Document:
    """Like :func:`read_mapping`, with the line table."""
    doc = read_document(path, error, what, max_bytes=max_bytes)
    if doc.data is None and empty_ok:
        doc.data = {}
    if not isinstance(doc.data, dict):
        shown = doc.data if doc.data is None or isinstance(doc.data, (int, float, str, bool)) \
            else type(doc.data).__name__
        raise error(path, "<root>", shown, expected)
    return doc


def parse_value(text: str, source: str, error: Callable, field: str) -> Any:
    """One ``--set`` value: a YAML 1.2 scalar, list or mapping, through the same checks."""
    if "\n" in text or "\r" in text:
        raise error(source, field, text, "expected a value on one line")
    if text.strip() == "":
        raise error(source, field, text, "expected a value after '='")

    def err(src, where, value, expected, line=None):
        return error(source, field, text, expected)

    return parse_text(text, source, err, want_lines=False).data


# --------------------------------------------------------------------------
# What kind of input a mapping is (to say "this is a trace, not a config")

_CONFIG_SECTIONS = {"dram", "fetch", "buffers", "dot", "softmax", "topk", "precision", "engine", "energy",
                    "area", "clock_ghz", "extends"}
_POLICY_KEYS = {"tokens", "heads", "values", "keys", "fit", "decode"}
_SPEC_KEYS = {"base", "axes", "linked", "keep_if", "objectives", "traces", "fixed"}
_PRESET_GROUPS = {"multiply_pj", "add_pj", "sram_read_64b_pj", "dram_pj_per_bit", "multiplier_um2",
                  "adder_um2"}


def guess_kind(data: Any) -> str | None:
    """The kind of attnsim input a parsed mapping looks like, or None when it is not clear.

    One of "an attention trace", "a sweep spec", "a pruning policy",
    "a technology preset", "an architecture config", "a result document".
    """
    if not isinstance(data, dict):
        return None
    keys = {k for k in data if isinstance(k, str)}
    if {"header", "steps"} <= keys:
        return "an attention trace"
    if "base" in keys and keys & {"axes", "linked", "traces"}:
        return "a sweep spec"
    if keys & _PRESET_GROUPS or (data.get("kind") in ("energy", "area") and "kind" in keys):
        return "a technology preset"
    if {"cycles", "units"} <= keys:
        return "a result document"
    if keys & _CONFIG_SECTIONS and not keys & (_POLICY_KEYS | {"header", "steps", "base", "axes"}):
        return "an architecture config"
    if keys & _POLICY_KEYS and not keys & _CONFIG_SECTIONS and keys <= _POLICY_KEYS | {"name"}:
        return "a pruning policy"
    return None


def locate(exc, doc: Document):
    """Give an InputError raised while checking ``doc`` the line of its field (when it has none)."""
    if getattr(exc, "line", None) is None and exc.source == doc.source and isinstance(exc.field, str):
        line = doc.line_of(exc.field)
        if line is not None:
            exc.located(line=line)
    return exc


def unknown_keys_error(error, source, unknown, line_of=None):
    """One error for every unknown key of a file: ``unknown`` is ``[(field, value, hint), ...]``.

    The first key is shown in full; the others follow by name (and line) on the same line.
    """
    field, value, hint = unknown[0]
    text = "unknown key" + hint
    if len(unknown) > 1:
        others = []
        for f, _v, h in unknown[1:]:
            line = line_of(f) if line_of else None
            others.append(f"{f}{f' (line {line})' if line else ''}{h}")
        text += f"; also unknown: {', '.join(others)}"
    return error(source, field, value, text, line=line_of(field) if line_of else None)


# --------------------------------------------------------------------------
# Writing YAML that reads back the same under YAML 1.1 and 1.2


_DUMPER_BASE: Any = getattr(yaml, "CSafeDumper", yaml.SafeDumper)


class _Dumper(_DUMPER_BASE):
    """Quotes every text that either YAML 1.1 or 1.2 would read as something else."""


_Dumper.yaml_implicit_resolvers = {k: list(v) for k, v in yaml.SafeDumper.yaml_implicit_resolvers.items()}
for _tag, _rx, _first in _IMPLICIT:
    _Dumper.add_implicit_resolver(_tag, re.compile(_rx), list(_first))


def dump(data: Any, stream=None, **options):
    """``yaml.dump`` with :class:`_Dumper` (block style by default)."""
    options.setdefault("sort_keys", False)
    return yaml.dump(data, stream, Dumper=_Dumper, **options)
