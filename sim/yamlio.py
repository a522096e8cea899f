"""Reading a YAML file that must hold one mapping, with errors that name the file and line."""

import yaml


def read_mapping(path, error, expected, empty_ok=False):
    """The mapping in ``path``; ``error`` (an InputError class) for a missing file,
    bad YAML (naming the line) or a top level that is not a mapping (``expected``)."""
    try:
        with open(path, encoding="utf-8") as fh:
            data = yaml.safe_load(fh)
    except FileNotFoundError:
        raise error(path, "<file>", path, "file not found") from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"line {mark.line + 1}" if mark else "<file>"
        raise error(path, where, "...", f"not valid YAML ({getattr(exc, 'problem', exc)})") from None
    if data is None and empty_ok:
        data = {}
    if not isinstance(data, dict):
        raise error(path, "<root>", data, expected)
    return data
