"""Errors that carry where the bad input is (file, line, field) and what was expected."""

from __future__ import annotations


class FilmmapInputError(ValueError):
    """Bad user input: a message that names the place and says what was expected.

    Parameters
    ----------
    message : str
        What is wrong and what was expected.
    file : str or path-like, optional
        The input file concerned.
    line : int, optional
        1-based line number in ``file``.
    field : str, optional
        The key, column or parameter concerned.
    """

    def __init__(self, message, *, file=None, line=None, field=None):
        self.file = None if file is None else str(file)
        self.line = line
        self.field = field
        self.reason = message
        super().__init__(self._compose())

    def _compose(self):
        where = []
        if self.file is not None:
            where.append(self.file + (f":{self.line}" if self.line is not None else ""))
        elif self.line is not None:
            where.append(f"line {self.line}")
        if self.field is not None:
            where.append(f"field '{self.field}'")
        prefix = ", ".join(where)
        return f"{prefix}: {self.reason}" if prefix else self.reason


class MaterialRangeError(FilmmapInputError):
    """A wavelength outside the validity range of a material model."""


class FilmmapOutputError(FilmmapInputError):
    """An output that could not be written (a full disk, a read-only medium, a lost path).

    Raised once the work has started, when a check before it could not foresee the
    problem; the message names the path and says what is left intact.  The command line
    exits with code 2, as for bad input: the remedy is the user's (free space, another
    folder), not a fix in filmmap.
    """
