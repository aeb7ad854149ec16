"""Reading the small TOML description files (range files, lattice files, ``run.toml``) safely.

Every failure ends in one :class:`~probeseq.exceptions.InputError` line naming the file and, where
known, the line or field: a missing file, a file too large for a description
(:data:`MAX_TOML_BYTES`), binary or non-UTF-8 bytes, malformed TOML, nesting deeper than
:data:`MAX_TOML_DEPTH`, and integers outside +-:data:`MAX_TOML_INT`. Field-specific checks
(types, units, ranges) stay with the readers of each file.
"""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

from ..exceptions import InputError

__all__ = ['MAX_TOML_BYTES', 'MAX_TOML_DEPTH', 'MAX_TOML_INT', 'clean_text', 'load_toml', 'loads_toml', 'short_repr']

#: largest description file read, bytes (1 MiB: a range file of ~10,000 ranges fits)
MAX_TOML_BYTES = 1 << 20


#: deepest nesting of tables and arrays accepted
MAX_TOML_DEPTH = 32


#: largest magnitude of an integer value (2**53: every such integer is exact as a float)
MAX_TOML_INT = 2 ** 53


_LONG_DIGITS = re.compile(r"[0-9][0-9_]{15,}")


_NL = b"\n"


def short_repr(value, limit: int = 40) -> str:
    """``repr`` of a value cut to ``limit`` characters, on one line, for messages."""
    if isinstance(value, int) and not isinstance(value, bool) and abs(value) > 10 ** 30:
        return f"an integer of about {int(value.bit_length() * 0.30103) + 1} digits"
    try:
        text = repr(value)
    except Exception:  # a value whose repr fails is named by its type
        text = f"<{type(value).__name__}>"
    return clean_text(text, limit)


def clean_text(text: str, limit: int = 60) -> str:
    """Text for a one-line message: control and non-printable characters escaped, cut to ``limit``."""
    text = "".join(c if c.isprintable() else c.encode("unicode_escape", "backslashreplace").decode("ascii")
                   for c in str(text)[: limit + 1])
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _line_of(text: str, pos: int) -> int:
    return text.count("\n", 0, max(0, pos)) + 1


def load_toml(path, what: str, max_bytes: int = MAX_TOML_BYTES) -> tuple:
    """Read and parse a small TOML description file.

    Parameters
    ----------
    path : str or Path
        The file.
    what : str
        What the file is, for messages (``"range file"``, ``"lattice file"``, ...).
    max_bytes : int
        Largest size accepted, bytes.

    Returns
    -------
    doc : dict
        The parsed document.
    text : str
        Its text (for locating fields by line).

    Raises
    ------
    InputError
        One line naming the file: not found, not a regular file, too large, binary or not UTF-8,
        malformed TOML, nested too deeply or an integer out of range.
    """
    p = Path(path)
    try:
        if not p.exists():
            raise InputError(f"{what} not found: {p} does not exist")
        if not p.is_file():
            raise InputError(f"{p}: the {what} is not a regular file")
        size = p.stat().st_size
        if size > max_bytes:
            raise InputError(f"{p}: the {what} has {size} bytes, more than the {max_bytes} bytes a description "
                             "file may have; is this the right file?")
        with open(p, "rb") as fh:
            data = fh.read(max_bytes + 1)
    except OSError as e:
        raise InputError(f"{p}: cannot read the {what} ({e.strerror or type(e).__name__})") from None
    if len(data) > max_bytes:
        raise InputError(f"{p}: the {what} has more than {max_bytes} bytes; is this the right file?")
    if b"\0" in data:
        at = data.index(b"\0")
        raise InputError(f"{p} line {data.count(_NL, 0, at) + 1}: the {what} holds binary data (a NUL byte); "
                         "expected UTF-8 TOML text")
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as e:
        raise InputError(f"{p} line {data.count(_NL, 0, e.start) + 1}: the {what} is not UTF-8 text "
                         f"(byte 0x{data[e.start]:02x}); expected UTF-8 TOML text") from None
    return loads_toml(text.removeprefix("\ufeff"), str(p), what), text


def loads_toml(text: str, where: str, what: str = "TOML text") -> dict:
    """Parse TOML text; every failure is an :class:`InputError` naming ``where``.

    Parameters
    ----------
    text : str
        The TOML document.
    where : str
        Name of its source, for messages (a path).
    what : str
        What the document is, for messages.

    Returns
    -------
    dict
        The parsed document, nested at most :data:`MAX_TOML_DEPTH` deep, integers within
        +-:data:`MAX_TOML_INT`.
    """
    if not isinstance(text, str):
        raise InputError(f"{where}: the {what} must be text, got {type(text).__name__}")
    if len(text) > MAX_TOML_BYTES:
        raise InputError(f"{where}: the {what} has more than {MAX_TOML_BYTES} characters; is this the right file?")
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise InputError(f"{where}: malformed TOML (the {what} is not valid TOML: {' '.join(str(e).split())})") from None
    except RecursionError:
        raise InputError(f"{where}: the {what} is nested too deeply (at most {MAX_TOML_DEPTH} levels of "
                         "tables and arrays)") from None
    except ValueError:  # an integer too long for Python's integer conversion
        m = _LONG_DIGITS.search(text)
        line = f" line {_line_of(text, m.start())}" if m else ""
        raise InputError(f"{where}{line}: the {what} holds an integer with thousands of digits; "
                         f"integers must lie within +-{MAX_TOML_INT}") from None
    _check_values(doc, where, what)
    return doc


def _check_values(doc: dict, where: str, what: str) -> None:
    """Refuse nesting deeper than MAX_TOML_DEPTH and integers beyond MAX_TOML_INT (iteratively)."""
    todo = [(doc, "", 1)]
    while todo:
        obj, path, depth = todo.pop()
        if depth > MAX_TOML_DEPTH:
            raise InputError(f"{where}: the {what} is nested too deeply at '{path}' (at most {MAX_TOML_DEPTH} "
                             "levels of tables and arrays)")
        items = obj.items() if isinstance(obj, dict) else ((f"[{i}]", v) for i, v in enumerate(obj))
        for k, v in items:
            sub = f"{path}{k}" if isinstance(obj, list) else (f"{path}.{k}" if path else str(k))
            if isinstance(v, (dict, list)):
                todo.append((v, sub, depth + 1))
            elif isinstance(v, int) and not isinstance(v, bool) and abs(v) > MAX_TOML_INT:
                raise InputError(f"{where}: field '{clean_text(sub, 60)}' = {short_repr(v)} is out of range "
                                 f"(integers must lie within +-{MAX_TOML_INT})")
