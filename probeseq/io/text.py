"""Reading CSV/TSV/TXT ion lists: bounded line reading, header layout, column resolution.
"""

from __future__ import annotations

import difflib
import re
from pathlib import Path

import numpy as np

from ..exceptions import InputError
from ..utils.tomlfile import clean_text
from .formats import ALL_COLUMNS, TEXT_SUFFIXES
from .ions import LEGACY_COLUMNS, REQUIRED_COLUMNS, IonList

# ---------------------------------------------------------------------- text
#: longest header line of a text ion file, bytes
MAX_HEADER_BYTES = 64 * 1024


#: most columns in a text ion file
MAX_TEXT_COLUMNS = 1024


#: longest data line examined when locating a bad value, bytes
MAX_LINE_BYTES = 1 << 20


def _decode_line(raw: bytes, p: Path, lineno: int) -> str:
    """A line of a text ion file as str; binary or non-UTF-8 bytes are an InputError naming the line."""
    if b"\0" in raw:
        raise InputError(f"{p} line {lineno}: holds binary data (a NUL byte); text ion files are UTF-8 text")
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as e:
        raise InputError(f"{p} line {lineno}: not UTF-8 text (byte 0x{raw[e.start]:02x} at byte {e.start + 1} of "
                         "the line); text ion files are UTF-8 text (is this a binary file?)") from None


_EOL = re.compile(rb"\r\n|\r|\n")


def _iter_lines(fh, limit: int, block: int = 1 << 16):
    """Yield ``(line number, bytes, whole)`` for the lines of a binary file ending in ``\\n``,
    ``\\r\\n`` or ``\\r``, without the line ending. A line longer than ``limit`` bytes is yielded
    once with its first ``limit`` bytes and ``whole=False``, and its rest skipped, so memory stays
    bounded by ``limit + block`` whatever the file holds."""
    lineno = 0
    carry = b""
    skipping = False
    while True:
        chunk = fh.read(block)
        buf = carry + chunk
        if chunk and buf.endswith(b"\r"):  # a CR at the end may be the first half of CR LF
            carry, buf = b"\r", buf[:-1]
        else:
            carry = b""
        pos = 0
        for m in _EOL.finditer(buf):
            line = buf[pos:m.start()]
            pos = m.end()
            if skipping:
                skipping = False
                continue
            lineno += 1
            yield lineno, line[:limit], len(line) <= limit
        rest = buf[pos:]
        if not chunk:
            if rest and not skipping:
                lineno += 1
                yield lineno, rest[:limit], len(rest) <= limit
            return
        if skipping:
            continue
        if len(rest) > limit:
            lineno += 1
            yield lineno, rest[:limit], False
            skipping = True
        else:
            carry = rest + carry


def _text_layout(p: Path, sep: str):
    """(line number of the header (1-based), header names) after skipping # comments and blanks.

    The header line may have at most :data:`MAX_HEADER_BYTES` bytes and :data:`MAX_TEXT_COLUMNS`
    columns; comment lines before it may be of any length (they are skipped in pieces).
    """
    with open(p, "rb") as fh:
        for lineno, raw, whole in _iter_lines(fh, MAX_HEADER_BYTES):
            if lineno == 1 and raw.startswith(b"\xef\xbb\xbf"):  # a UTF-8 byte-order mark
                raw = raw[3:]
            if raw.lstrip().startswith(b"#"):  # comments may be of any length
                continue
            if not whole:
                raise InputError(f"{p} line {lineno}: the header line is longer than {MAX_HEADER_BYTES} bytes; "
                                 "expected a short row of column names such as x,y,z,mass_to_charge")
            s = _decode_line(raw, p, lineno).strip()
            if not s:
                continue
            names = [c.strip().lower() for c in s.split(sep)]
            if len(names) > MAX_TEXT_COLUMNS:
                raise InputError(f"{p} line {lineno}: the header has {len(names)} columns, more than "
                                 f"{MAX_TEXT_COLUMNS}; expected column names such as x,y,z,mass_to_charge")
            return lineno, names
    raise InputError(f"{p}: no header row (the file holds only comments or blank lines)")


def _resolve_columns(p: Path, names: list, sep: str):
    """The known columns named in the header, in :data:`ALL_COLUMNS` order (linear in the columns)."""
    present = set(names)
    missing = [c for c in REQUIRED_COLUMNS if c not in present]
    if missing:
        # close-match hints from a bounded set of short candidate names
        candidates = []
        seen = set()
        for n in names:
            if n and n not in seen and len(n) <= 40:
                seen.add(n)
                candidates.append(n)
                if len(candidates) >= 64:
                    break
        hints = []
        for c in missing:
            close = difflib.get_close_matches(c, candidates, n=1, cutoff=0.6)
            if close:
                hints.append(f"'{clean_text(close[0], 40)}' for '{c}'?")
        shown = [clean_text(n, 30) for n in names[:20] if n]
        found = ", ".join(shown) + (f", ... ({len(names)} columns)" if len(names) > 20 else "") if shown else "none"
        extra = ""
        if len(names) == 1 and sep == "," and "\t" in names[0]:
            extra = " (the file looks tab-separated: name it .tsv)"
        elif len(names) == 1 and sep == "\t" and "," in names[0]:
            extra = " (the file looks comma-separated: name it .csv)"
        hint = (" did you mean " + " ".join(hints)) if hints else ""
        raise InputError(f"{p}: missing required column(s) {', '.join(missing)}; found: {found}{extra}{hint}")
    counts = {}
    for n in names:
        if n in ALL_COLUMNS:
            counts[n] = counts.get(n, 0) + 1
    dup = sorted(n for n, k in counts.items() if k > 1)
    if dup:
        raise InputError(f"{p}: column(s) named twice in the header: {', '.join(dup)}")
    return [c for c in ALL_COLUMNS if c in counts]


def _find_bad_value(p: Path, sep: str, header_line: int, names: list, wanted: list):
    """Line number and text of the first value that is not a number (slow path, for the message)."""
    idx = {c: names.index(c) for c in wanted}
    with open(p, "rb") as fh:
        for lineno, raw, whole in _iter_lines(fh, MAX_LINE_BYTES):
            if lineno <= header_line or raw.lstrip().startswith(b"#"):
                continue
            if not whole:
                return f"line {lineno}: longer than {MAX_LINE_BYTES} bytes; expected one ion per line"
            s = _decode_line(raw, p, lineno).strip()
            if not s or s.startswith("#"):
                continue
            parts = s.split(sep)
            if len(parts) < len(names):
                return f"line {lineno}: expected {len(names)} fields, found {len(parts)}"
            for c, i in idx.items():
                v = parts[i].strip()
                try:
                    float(v)
                except ValueError:
                    return f"line {lineno}: column '{c}' holds '{clean_text(v, 30)}', not a number"
    return None


def _read_text(p: Path, length_unit: str, strict: bool) -> IonList:
    import pandas as pd

    sep = TEXT_SUFFIXES[p.suffix.lower()]
    header_line, names = _text_layout(p, sep)
    names = [LEGACY_COLUMNS.get(n, n) for n in names]
    wanted = _resolve_columns(p, names, sep)
    usecols = [names.index(c) for c in wanted]
    # fast path (measured: comment handling and usecols each cost pandas' C parser about 2x);
    # on any failure retry with '#' comments and only the wanted columns, then diagnose
    attempts = ({"usecols": None, "comment": None}, {"usecols": usecols, "comment": "#"})
    df = None
    for i, kw in enumerate(attempts):
        try:
            df = pd.read_csv(p, sep=sep, header=None, skiprows=header_line, dtype=np.float64, engine="c",
                             skip_blank_lines=True, **kw)
            break
        except pd.errors.EmptyDataError:
            raise InputError(f"{p}: no data rows after the header") from None
        except (ValueError, TypeError, pd.errors.ParserError) as e:
            if i == 0:
                continue
            where = _find_bad_value(p, sep, header_line, names, wanted)
            raise InputError(f"{p}: {where}" if where else f"{p}: could not parse ({str(e).splitlines()[0]})") from None
    if any(i not in df.columns for i in usecols):
        where = _find_bad_value(p, sep, header_line, names, wanted)
        raise InputError(f"{p}: {where or 'rows have fewer fields than the header'}")
    if len(df) == 0:
        raise InputError(f"{p}: no data rows after the header")
    cols = {c: df[i].to_numpy() for c, i in zip(wanted, usecols)}
    return cols
