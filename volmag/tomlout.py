"""TOML text from a case document: the inverse of `tomllib.loads` for what
case files hold (strings, booleans, integers, floats, arrays, tables).

Top-level tables become ``[table]`` sections and arrays of tables
``[[table]]`` sections; deeper tables are written inline, as case files
usually write ``shape`` and ``mesh``. Floats are written by `repr`, which
reads back to the same double, so a document survives the round trip
exactly (types included).
"""
from __future__ import annotations

import json
import math
import re

_BARE = re.compile(r"^[A-Za-z0-9_-]+$")


def to_toml(doc: dict) -> str:
    """TOML text of the document `doc` (a dict as tomllib returns it)."""
    head, sections = [], []
    for k, v in doc.items():
        if isinstance(v, dict):
            sections.append(f"\n[{toml_key(k)}]\n" + _pairs(v))
        elif isinstance(v, list) and v and all(isinstance(t, dict) for t in v):
            sections += [f"\n[[{toml_key(k)}]]\n" + _pairs(t) for t in v]
        else:
            head.append(f"{toml_key(k)} = {toml_value(v)}\n")
    return "".join(head + sections)


def _pairs(table: dict) -> str:
    return "".join(f"{toml_key(k)} = {toml_value(v)}\n" for k, v in table.items())


def toml_key(k: str) -> str:
    """A key, bare when it can be, else quoted."""
    return k if _BARE.match(k) else toml_value(k)


def toml_value(v) -> str:
    """A value in TOML syntax (tables inline)."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        return repr(v) if math.isfinite(v) else ("inf" if v > 0 else "-inf")
    if isinstance(v, str):  # a JSON string is a TOML basic string once DEL is escaped too
        return json.dumps(v, ensure_ascii=False).replace("\x7f", "\\u007f")
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{toml_key(a)} = {toml_value(b)}" for a, b in v.items()) + " }" if v else "{}"
    raise TypeError(f"{type(v).__name__} values cannot be written to a case file")
