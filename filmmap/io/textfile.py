"""The one strict reader of input text files, shared by every reader in `filmmap.io`.

Spectra files (every layout), site and slot maps, dark and reference spectra, n,k tables
and the lot file are all read through `read_text_file`: read-only, whole, with a size
limit, and refused with a message naming the file (and the line, where there is one) when
they are not UTF-8 text:

- a file larger than ``max_bytes`` (or one that grows past it while being read);
- a directory, a missing or unreadable file;
- a UTF-16 file (it starts with a UTF-16 byte-order mark);
- NUL bytes: binary data, or UTF-16 without a byte-order mark;
- bytes that are not UTF-8 (the message gives the byte, its offset and its line).

A leading UTF-8 byte-order mark is dropped, and CRLF or bare CR line ends become LF, so
line numbers are those an editor shows.
"""

from __future__ import annotations

import codecs
import hashlib
import os
from dataclasses import dataclass
from pathlib import Path

from filmmap.errors import FilmmapInputError

__all__ = ["TextFile", "read_text_file", "DEFAULT_MAX_BYTES"]

#: Largest input file read by default (bytes); larger files are refused.
DEFAULT_MAX_BYTES = 512 * 2**20


@dataclass(frozen=True)
class TextFile:
    """A text file as read.

    Attributes
    ----------
    path : pathlib.Path
        The file.
    text : str
        Its text: UTF-8 decoded, without a byte-order mark, line ends as ``\\n``.
    sha256 : str
        Hex SHA-256 of the file's bytes as stored (provenance).
    """

    path: Path
    text: str
    sha256: str


def read_text_file(path, max_bytes=DEFAULT_MAX_BYTES, *, what="file",
                   expected="a UTF-8 CSV text file"):
    """Read a whole UTF-8 text file, read-only, with the input checks of every reader.

    Parameters
    ----------
    path : str or path-like
        The file; opened read-only, never modified.
    max_bytes : int
        Refuse files larger than this many bytes.
    what : str
        What the file is, for messages (``"file"``, ``"lot file"``, ``"n,k table"``).
    expected : str
        What it should be, for messages (``"a UTF-8 CSV text file"``, ...).

    Returns
    -------
    TextFile

    Raises
    ------
    FilmmapInputError
        Naming the file (and the line where the problem has one): too large, a
        directory, unreadable, UTF-16, NUL bytes, not UTF-8.
    ValueError
        A ``max_bytes`` that is not a positive number (a programming error).
    """
    path = Path(path)
    raw = _read_bytes(path, max_bytes, what)
    return TextFile(path=path, text=_decode(raw, path, what, expected),
                    sha256=hashlib.sha256(raw).hexdigest())


def _read_bytes(path, max_bytes, what):
    """Read a whole file read-only, refusing directories and files over ``max_bytes``."""
    if max_bytes is None or not int(max_bytes) > 0:
        raise ValueError("max_bytes must be a positive number of bytes")
    max_bytes = int(max_bytes)
    try:
        size = os.stat(path).st_size
        if size > max_bytes:
            raise FilmmapInputError(
                f"{what} is {size} bytes, larger than the limit of {max_bytes} bytes; "
                "pass a larger max_bytes if this file is genuine", file=path)
        with open(path, "rb") as fh:
            raw = fh.read(max_bytes + 1)
    except FilmmapInputError:
        raise
    except IsADirectoryError:
        raise FilmmapInputError(f"expected a {what}, found a directory", file=path) from None
    except OSError as exc:
        raise FilmmapInputError(f"cannot read {what}: {exc.strerror or exc}", file=path) from None
    if len(raw) > max_bytes:
        raise FilmmapInputError(f"{what} grew beyond the limit of {max_bytes} bytes while "
                                "reading", file=path)
    return raw


def _line_at(raw, offset):
    """1-based line of a byte offset."""
    return raw.count(b"\n", 0, offset) + 1


def _decode(raw, path, what, expected):
    """Bytes -> text (UTF-8, optional BOM); say so when the file is not UTF-8 text."""
    if raw.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE)):
        raise FilmmapInputError(f"{what} is UTF-16 encoded; expected UTF-8 text (save it as "
                                "UTF-8)", file=path, line=1)
    nul = raw.find(b"\x00")
    if nul >= 0:
        raise FilmmapInputError(
            f"{what} contains NUL bytes: binary data, not {expected} (or UTF-16 text without "
            "a byte-order mark)", file=path, line=_line_at(raw, nul))
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise FilmmapInputError(
            f"{what} is not UTF-8 text: invalid byte 0x{raw[exc.start]:02x} at byte offset "
            f"{exc.start}; expected {expected} (binary data or another encoding?)",
            file=path, line=_line_at(raw, exc.start)) from None
    if text.startswith("\ufeff"):
        text = text[1:]
    if "\r" in text:
        text = text.replace("\r\n", "\n").replace("\r", "\n")
    return text
