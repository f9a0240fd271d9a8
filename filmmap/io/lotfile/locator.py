"""Where each key of a TOML document stands: field path -> line, for error messages.

`tomllib` parses but does not say where a value was written; this best-effort scanner
maps field paths as the lot file's messages write them (``stack.layer[1].material``,
array entries counted from 1, as a user counts) to their 1-based line. It follows table
and array-of-tables headers, dotted keys, inline tables inside arrays (one per
``furnace.zones[i]``) and skips multi-line strings.
"""

from __future__ import annotations

import re

__all__ = ["key_lines"]

_TABLE_HEAD = re.compile(r"\[\s*([^\[\]]+?)\s*\]")
_ARRAY_HEAD = re.compile(r"\[\[\s*([^\[\]]+?)\s*\]\]")
_KEY_PART = r"""(?:[A-Za-z0-9_-]+|"[^"]*"|'[^']*')"""
_KEY_LINE = re.compile(rf"({_KEY_PART}(?:\s*\.\s*{_KEY_PART})*)\s*=")


def _norm_key(key):
    """``a . "b.c" . d`` -> ``a.b.c.d`` (quotes dropped; good enough for locating lines)."""
    return ".".join(p.strip("\"'") for p in re.findall(r'"[^"]*"|\'[^\']*\'|[^.\s]+', key))


def key_lines(text):
    """Best-effort map from field path (``stack.layer[1].material``) to its 1-based line.

    Parameters
    ----------
    text : str
        The TOML text.

    Returns
    -------
    dict of str to int
        Field path (array entries counted from 1) -> the line where it is first written;
        a table or array entry maps to its header line.
    """
    where = {}
    prefix = ""
    arrays = {}
    in_string = None
    in_array = None  # (field path, element count, depth)
    for lineno, raw in enumerate(text.splitlines(), start=1):
        s = raw.strip()
        if in_string:
            if s.count(in_string) % 2 == 1:
                in_string = None
            continue
        if in_array is not None:
            path, count, depth = in_array
            for ch in s.split("#", 1)[0]:
                if ch == "{" and depth == 1:
                    count += 1
                    where.setdefault(f"{path}[{count}]", lineno)
                depth += (ch in "[{") - (ch in "]}")
            in_array = (path, count, depth) if depth > 0 else None
            continue
        if not s or s.startswith("#"):
            continue
        m = _ARRAY_HEAD.match(s)
        if m:
            name = _norm_key(m.group(1))
            arrays[name] = arrays.get(name, 0) + 1
            prefix = f"{name}[{arrays[name]}]"
            where.setdefault(prefix, lineno)
            where.setdefault(name, lineno)
            continue
        m = _TABLE_HEAD.match(s)
        if m:
            name = _norm_key(m.group(1))
            prefix = name
            for arr, n in arrays.items():
                if name.startswith(arr + "."):
                    prefix = f"{arr}[{n}]{name[len(arr):]}"
            where.setdefault(prefix, lineno)
            continue
        m = _KEY_LINE.match(s)
        if not m:
            continue
        path = (prefix + "." if prefix else "") + _norm_key(m.group(1))
        where.setdefault(path, lineno)
        value = s[m.end():].strip()
        for delim in ('"""', "'''"):
            if value.count(delim) % 2 == 1:
                in_string = delim
        if value.startswith("["):
            count, depth = 0, 0
            for ch in value.split("#", 1)[0]:
                if ch == "{" and depth == 1:
                    count += 1
                    where.setdefault(f"{path}[{count}]", lineno)
                depth += (ch in "[{") - (ch in "]}")
            if depth > 0:
                in_array = (path, count, depth)
    return where


