"""Model shapes by name: layers, query heads, K/V heads and head width.

A shape file is YAML with a ``shapes`` mapping from a name to ``layers``,
``heads``, ``kv_heads``, ``head_dim`` and an optional ``description``. The
bundled one is ``traces/shapes.yaml``. ``attnsim trace synth --shape`` takes a
bundled name, a shape file holding one shape, or ``FILE:NAME``.
"""

import dataclasses
import os

from .. import bundled, yamlio
from ..errors import TraceError, closest

BUNDLED = bundled.path("traces", "shapes.yaml") or os.path.join(
    os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))), "traces", "shapes.yaml")
LIMITS = {"layers": 1 << 20, "heads": 1 << 16, "kv_heads": 1 << 16, "head_dim": 1 << 14}
SHAPE_KEYS = ("description", "layers", "heads", "kv_heads", "head_dim")


@dataclasses.dataclass(frozen=True)
class Shape:
    """The attention shape of a model: what a synthetic trace needs to know of it."""

    name: str
    layers: int
    heads: int
    kv_heads: int
    head_dim: int
    description: str = ""


def read_shapes(path):
    """All shapes of a shape file, validated: ``{name: Shape}``."""
    ydoc = yamlio.read_document(path, TraceError, "shape file")
    doc = ydoc.data
    try:
        return _shapes(path, doc)
    except TraceError as exc:
        raise yamlio.locate(exc, ydoc) from None


def _shapes(path, doc):
    if not isinstance(doc, dict) or set(doc) != {"shapes"} or not isinstance(doc["shapes"], dict) \
            or not doc["shapes"]:
        raise TraceError(path, "shapes", doc if not isinstance(doc, dict) else list(doc),
                         "expected a mapping 'shapes' of NAME: {layers, heads, kv_heads, head_dim}")
    return {str(name): _shape(path, str(name), entry) for name, entry in doc["shapes"].items()}


def _shape(path, name, entry):
    at = f"shapes.{name}"
    if not isinstance(entry, dict):
        raise TraceError(path, at, entry, "expected a mapping with layers, heads, kv_heads, head_dim")
    for key in entry:
        if key not in SHAPE_KEYS:
            raise TraceError(path, f"{at}.{key}", entry[key], "unknown shape key" + closest(key, SHAPE_KEYS))
    for key in SHAPE_KEYS[1:]:
        v = entry.get(key)
        if isinstance(v, bool) or not isinstance(v, int) or v < 1:
            raise TraceError(path, f"{at}.{key}", v, "expected a whole number >= 1")
        if v > LIMITS[key]:
            raise TraceError(path, f"{at}.{key}", v, f"expected a whole number <= {LIMITS[key]:,}")
    if entry["heads"] % entry["kv_heads"]:
        raise TraceError(path, f"{at}.kv_heads", entry["kv_heads"],
                         f"expected a divisor of heads={entry['heads']} (equal groups of query heads)")
    desc = entry.get("description", "")
    if not isinstance(desc, str):
        raise TraceError(path, f"{at}.description", desc, "expected text")
    return Shape(name, entry["layers"], entry["heads"], entry["kv_heads"], entry["head_dim"], desc)


def load_shape(spec):
    """A :class:`Shape` from a bundled name, a one-shape file, or ``FILE:NAME``."""
    if not isinstance(spec, str) or not spec:
        raise TraceError("--shape", "shape", spec, "expected a shape name or a shape file")
    path, name = spec, None
    if not os.path.isfile(spec):
        head, sep, tail = spec.rpartition(":")
        if sep and os.path.isfile(head):
            path, name = head, tail
        elif not spec.endswith((".yaml", ".yml")) and os.sep not in spec:
            path, name = BUNDLED, spec
    shapes = read_shapes(path)
    if name is None:
        if len(shapes) != 1:
            raise TraceError(path, "shapes", sorted(shapes), "expected one shape, or pick one with FILE:NAME")
        return next(iter(shapes.values()))
    if name not in shapes:
        raise TraceError(path, "shapes", name,
                         f"unknown shape; expected one of {', '.join(sorted(shapes))}" + closest(name, shapes))
    return shapes[name]
