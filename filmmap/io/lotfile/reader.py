"""Typed, located access to a parsed lot file: every value checked once, every error placed.

`LotReader` wraps the parsed TOML document with the file's path and its key lines
(`filmmap.io.lotfile.locator`). Each accessor checks one value's type and bounds and, when
it is wrong, raises `filmmap.errors.FilmmapInputError` naming the file, the line and the
lot file's own field path (``recipe.step[3].at_C``, array entries counted from 1), and
saying what was expected and what was found.
"""

from __future__ import annotations

import datetime
import difflib
import math

from filmmap.bounds import MAX_ID_CHARS
from filmmap.errors import FilmmapInputError
from filmmap.io.lotfile.locator import key_lines
from filmmap.io.lotfile.schema import KEYS

__all__ = ["LotReader", "found", "is_number"]

_TYPE_NAMES = ((bool, "boolean"), (int, "integer"), (float, "float"), (str, "string"),
               (list, "array"), (dict, "table"), (datetime.datetime, "date-time"),
               (datetime.date, "date"), (datetime.time, "time"))

_KIND_TEXT = {"string": "a string", "number": "a number", "integer": "an integer",
              "boolean": "a boolean (true or false)", "array": "an array", "table": "a table"}


def _type_name(value):
    # bool before int and datetime before date: each is a subclass of the next
    return next((name for kind, name in _TYPE_NAMES if isinstance(value, kind)),
                type(value).__name__)


def found(value):
    """``"<TOML type> <repr>"`` of a value, shortened, for "found ..." in messages."""
    text = repr(value)
    if len(text) > 60:
        text = text[:57] + "..."
    return f"{_type_name(value)} {text}"


def is_number(value):
    """True for a TOML integer or float (not a boolean)."""
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _is_kind(value, kind):
    return {"string": isinstance(value, str), "number": is_number(value),
            "integer": isinstance(value, int) and not isinstance(value, bool),
            "boolean": isinstance(value, bool), "array": isinstance(value, list),
            "table": isinstance(value, dict)}[kind]


def _range_text(lo, hi, lo_open, hi_open):
    if lo is not None and hi is not None:
        return f"{lo:g} {'<' if lo_open else '<='} value {'<' if hi_open else '<='} {hi:g}"
    if lo is not None:
        return f"value {'>' if lo_open else '>='} {lo:g}"
    return f"value {'<' if hi_open else '<='} {hi:g}"


def _suggestion(value, choices):
    """``"; did you mean 'x'?"`` for the closest choice (or one differing only in case)."""
    close = difflib.get_close_matches(value, choices, n=1, cutoff=0.5)
    if not close:
        close = [c for c in choices if c.lower() == value.lower()]
    return f"; did you mean {close[0]!r}?" if close else ""


class LotReader:
    """Typed, located access to the parsed TOML document of one lot file.

    Parameters
    ----------
    path : pathlib.Path
        The lot file (for messages).
    text : str
        Its text (to locate keys).

    Notes
    -----
    ``where`` arguments are field paths of tables (``"measurement"``,
    ``"stack.layer[1]"``); a value's field is ``f"{where}.{key}"``.
    """

    def __init__(self, path, text):
        self.path = path
        self.lines = key_lines(text)

    def line_of(self, field):
        """Line of ``field``, else of its nearest enclosing table or array entry, else None."""
        probe = field
        while probe:
            if probe in self.lines:
                return self.lines[probe]
            cut = max(probe.rfind("."), probe.rfind("["))
            probe = probe[:cut] if cut > 0 else ""
        return None

    def fail(self, message, field):
        """Raise `FilmmapInputError` naming the file, the line of ``field`` and ``field``."""
        raise FilmmapInputError(message, file=self.path, line=self.line_of(field), field=field)

    def keys(self, table, where, schema):
        """Reject keys not in ``KEYS[schema]``, suggesting the closest one."""
        allowed = KEYS[schema]
        for key in table:
            if key not in allowed:
                field = f"{where}.{key}" if where else key
                section = ("the top level" if not where else where if "[" in where
                           else f"[{where}]")
                self.fail(f"unknown key {key!r}{_suggestion(key, allowed)} (valid keys in "
                          f"{section}: {', '.join(allowed)})", field)

    def table(self, parent, key, where, required=False, what=None):
        """The sub-table ``key`` of ``parent``, or None when absent and not required."""
        field = f"{where}.{key}" if where else key
        if key not in parent:
            if required:
                self.fail(f"missing required {what or f'[{field}] table'}", field)
            return None
        value = parent[key]
        if not isinstance(value, dict):
            self.fail(f"expected a table [{field}], found {found(value)}", field)
        return value

    def tables(self, parent, key, where, what):
        """A non-empty array of tables ``[[where.key]]``, or None when absent.

        ``what`` names the entries in the message when the array is empty.
        """
        field = f"{where}.{key}" if where else key
        raw = parent.get(key)
        if raw is None:
            return None
        if not isinstance(raw, list) or not all(isinstance(x, dict) for x in raw):
            self.fail(f"expected [[{field}]] tables (an array of tables), found {found(raw)}",
                      field)
        if not raw:
            self.fail(f"no {what}; expected one or more [[{field}]] tables", field)
        return raw

    def value(self, table, key, where, kind, required=False, default=None):
        """The value ``key`` of kind ``"string"``, ``"number"`` (as a finite float),
        ``"integer"``, ``"boolean"``, ``"array"`` or ``"table"``, or ``default``."""
        field = f"{where}.{key}"
        if key not in table:
            if required:
                self.fail(f"missing required key {key!r} in {where} ({_KIND_TEXT[kind]})", field)
            return default
        value = table[key]
        if not _is_kind(value, kind):
            self.fail(f"expected {_KIND_TEXT[kind]}, found {found(value)}", field)
        if kind == "number":
            if not math.isfinite(value):
                self.fail(f"expected a finite number, found {value!r}", field)
            value = float(value)
        return value

    def number(self, table, key, where, required=False, default=None, lo=None, hi=None,
               lo_open=False, hi_open=False, unit=""):
        """A finite number within [lo, hi] (``lo_open``/``hi_open`` exclude the ends; None =
        unbounded); ``unit`` (e.g. ``" nm"``) is written after the values in messages."""
        value = self.value(table, key, where, "number", required, default)
        if value is None or key not in table:
            return value
        bad_lo = lo is not None and (value <= lo if lo_open else value < lo)
        bad_hi = hi is not None and (value >= hi if hi_open else value > hi)
        if bad_lo or bad_hi:
            expected = _range_text(lo, hi, lo_open, hi_open)
            self.fail(f"{key} = {value:g}{unit} is out of range; expected {expected}{unit}",
                      f"{where}.{key}")
        return value

    def numbers(self, table, where, bounds):
        """``{key: value}`` of the keys of ``bounds`` (``{key: (lo, hi)}``) present in
        ``table``, each a number within its closed bounds."""
        out = {}
        for key, (lo, hi) in bounds.items():
            value = self.number(table, key, where, lo=lo, hi=hi)
            if value is not None:
                out[key] = value
        return out

    def pair(self, table, key, where, default=None, max_hi=None):
        """A ``[lo, hi]`` array of numbers with 0 < lo < hi (nm), ``hi <= max_hi``."""
        if key not in table:
            return default
        v = self.value(table, key, where, "array")
        field = f"{where}.{key}"
        if len(v) != 2 or not all(is_number(x) for x in v):
            self.fail(f"expected [lo, hi], two numbers in nm, found {found(v)}", field)
        lo, hi = float(v[0]), float(v[1])
        if not (math.isfinite(lo) and math.isfinite(hi) and 0 < lo < hi):
            self.fail(f"{key} = [{lo:g}, {hi:g}]: expected 0 < lo < hi (nm)", field)
        if max_hi is not None and hi > max_hi:
            self.fail(f"{key} = [{lo:g}, {hi:g}]: the upper end is above {max_hi:g} nm; "
                      "expected a thickness range a film can have", field)
        return (lo, hi)

    def string(self, table, key, where, required=False, default=None, choices=None):
        """A string, one of ``choices`` when given (else not blank)."""
        value = self.value(table, key, where, "string", required, default)
        if value is None or key not in table:
            return value
        if choices is not None and value not in choices:
            self.fail(f"{key} = {value!r} is not valid{_suggestion(value, choices)} (expected "
                      f"one of {', '.join(repr(c) for c in choices)})", f"{where}.{key}")
        if choices is None and not value.strip():
            self.fail(f"{key} is empty; expected a non-empty string", f"{where}.{key}")
        return value

    def name(self, table, key, where, required=False):
        """A non-blank string of at most MAX_ID_CHARS characters: ids and names end up in
        file names, tables and the history."""
        value = self.string(table, key, where, required=required)
        if value is not None and len(value) > MAX_ID_CHARS:
            self.fail(f"{value[:24]!r}... is {len(value)} characters; expected at most "
                      f"{MAX_ID_CHARS}", f"{where}.{key}")
        return value

    def int_list(self, table, key, where, lo, hi):
        """A list of distinct integer boat slots within [lo, hi] (default empty)."""
        values = self.value(table, key, where, "array", default=[])
        out = []
        for i, v in enumerate(values, start=1):
            if not (isinstance(v, int) and not isinstance(v, bool)):
                self.fail(f"{key}[{i}]: expected an integer slot, found {found(v)}",
                          f"{where}.{key}")
            if not lo <= v <= hi:
                self.fail(f"{key}[{i}] = {v} is outside the boat (slots {lo}..{hi})",
                          f"{where}.{key}")
            if v in out:
                self.fail(f"{key}: slot {v} is listed twice", f"{where}.{key}")
            out.append(v)
        return tuple(out)
