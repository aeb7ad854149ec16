"""Readers and writers of ion lists in open formats: CSV/TSV text and HDF5.

Text (``.csv``; ``.tsv`` and ``.txt`` tab-separated): lines starting with ``#`` are comments, then
one header row, then one ion per row. Required columns ``x, y, z, mass_to_charge``; optional
``multiplicity, pulse, voltage``; other columns are ignored. Header names are matched without
regard to case or surrounding spaces.

HDF5 (``.h5``, ``.hdf5``): group ``/ions`` with 1-D datasets ``x, y, z, mass_to_charge`` (float32
or float64, equal length; optional ``multiplicity, pulse, voltage``) and the attribute
``length_unit`` (``"nm"`` or ``"angstrom"``; nm when absent). Any other layout is read with
``position_dataset`` (an N x 3 dataset) and ``mass_dataset``. Reading is chunked: see
:func:`iter_ion_chunks` for streaming files larger than memory, and :class:`IonSource` for block
reads into caller buffers (or zero-copy views of the page cache) of plain layouts without the HDF5
layer, as the streamed analysis uses them (:func:`read_ion_sample` for its sample of depth blocks).

Positions are converted to nm once, here. Rows with NaN/inf values or non-positive mass-to-charge
are dropped and counted in :class:`~probeseq.ions.IonMeta` (``strict=True`` makes them an error);
positions beyond +-:data:`~probeseq.ions.MAX_ABS_POSITION_NM` (1e5 nm) are refused as a unit or
column mistake. Input files are only ever opened for reading.

Hostile files end in one :class:`~probeseq.exceptions.InputError` line. HDF5: soft links inside
the file are followed (a dangling or looping one is named); external links, datasets kept in
separate raw files (HDF5 external storage) and virtual datasets mapping other files are refused,
so only bytes of the named file are ever read; boolean, text, compound and complex datasets are
refused; float16 is widened exactly to float32 and integers are read as float64; ``length_unit``
must be one UTF-8 text value. Text: the header line may have at most :data:`MAX_HEADER_BYTES`
bytes and :data:`MAX_TEXT_COLUMNS` columns, and the file must be UTF-8 text without NUL bytes.
"""

from __future__ import annotations

import difflib
import hashlib
import os
import re
import warnings
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

import numpy as np

from .exceptions import DataQualityWarning, InputError
from .ions import LENGTH_UNITS, OPTIONAL_COLUMNS, REQUIRED_COLUMNS, IonList, IonMeta
from .tomlfile import clean_text

__all__ = ["read_ions", "write_ions", "iter_ion_chunks", "file_sha256", "file_sha256_mapped", "ion_file_kind",
           "count_ions", "IonSource",
           "sample_blocks", "read_ion_sample"]

TEXT_SUFFIXES = {".csv": ",", ".tsv": "\t", ".txt": "\t"}
HDF5_SUFFIXES = {".h5", ".hdf5"}
ALL_COLUMNS = REQUIRED_COLUMNS + OPTIONAL_COLUMNS
DEFAULT_CHUNK = 4_000_000


def file_sha256(path, block: int = 1 << 22) -> str:
    """SHA-256 hex digest of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while True:
            b = fh.read(block)
            if not b:
                break
            h.update(b)
    return h.hexdigest()


def file_sha256_mapped(path, window: int = 64 << 20) -> str:
    """SHA-256 hex digest of a file's bytes, hashed straight from the page cache through memory
    maps of ``window`` bytes (no copy, bounded resident memory; the GIL is released while hashing).
    Falls back to :func:`file_sha256` where memory maps are not available."""
    import mmap

    p = Path(path)
    size = p.stat().st_size
    if not hasattr(mmap, "MAP_SHARED") or size == 0:
        return file_sha256(p)
    h = hashlib.sha256()
    window = max(mmap.ALLOCATIONGRANULARITY, window - window % mmap.ALLOCATIONGRANULARITY)
    fd = os.open(p, os.O_RDONLY)
    try:
        for off in range(0, size, window):
            # no MAP_POPULATE: Python holds the GIL through the whole mmap call, which would stall
            # the other threads; the pages fault in during update(), which releases the GIL
            mm = mmap.mmap(fd, min(window, size - off), flags=mmap.MAP_SHARED, prot=mmap.PROT_READ, offset=off)
            try:
                h.update(mm)
            finally:
                mm.close()
    finally:
        os.close(fd)
    return h.hexdigest()


def ion_file_kind(path) -> str:
    """``"text"`` or ``"hdf5"`` from the file's extension; :class:`InputError` otherwise."""
    suf = Path(path).suffix.lower()
    if suf in TEXT_SUFFIXES:
        return "text"
    if suf in HDF5_SUFFIXES:
        return "hdf5"
    raise InputError(f"{path}: unknown ion file extension '{suf}' (expected .csv, .tsv, .txt, .h5 or .hdf5)")


def _check_unit(length_unit, where):
    if not isinstance(length_unit, str) or length_unit not in LENGTH_UNITS:
        raise InputError(f"{where}: unknown length unit '{clean_text(length_unit, 40)}' "
                         f"(expected one of: {', '.join(LENGTH_UNITS)})")
    return LENGTH_UNITS[length_unit]


def _read_dtype(dtype) -> np.dtype:
    """Native float dtype a column is read into: float32 for floats of up to 4 bytes (float16 is
    widened exactly), float64 for everything else (float64, integers, wider floats)."""
    return np.dtype(np.float32) if dtype.kind == "f" and dtype.itemsize <= 4 else np.dtype(np.float64)


def _check_file(path) -> Path:
    p = Path(path)
    if not p.exists():
        raise InputError(f"ion file not found: {p}")
    if not p.is_file():
        raise InputError(f"{p}: is not a file")
    if p.stat().st_size == 0:
        raise InputError(f"{p}: file is empty")
    return p


def _warn_dropped(ions: IonList, where: str):
    if ions.meta.n_dropped:
        why = ", ".join(f"{n} {k}" for k, n in ions.meta.dropped.items())
        warnings.warn(f"{where}: dropped {ions.meta.n_dropped} rows ({why})", DataQualityWarning, stacklevel=3)


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


# ---------------------------------------------------------------------- hdf5
def _open_h5(p: Path):
    import h5py

    try:
        return h5py.File(p, "r")
    except OSError as e:
        msg = str(e).split("(")[0].strip() or "unreadable"
        raise InputError(f"{p}: not a readable HDF5 file ({msg}); the file may be truncated or of another format") from None


_MAX_SOFT_LINKS = 16


def _h5_get(f, path: str, p: Path):
    """The object at ``path``, following hard and soft links inside the file.

    External links (and user-defined links) are refused: probeseq reads only data stored in the
    ion file itself. A soft link that leads nowhere or in a loop is named in the message.
    Returns None when nothing is at ``path`` (and no soft link on the way).
    """
    import h5py

    shown = clean_text(path)
    pending = [q for q in str(path).split("/") if q]
    pending.reverse()
    obj = f["/"]
    at = []  # names from the root to obj
    hops = 0
    via = None  # (link path, target) of the last soft link followed
    while pending:
        name = pending.pop()
        here = "/" + "/".join(at)
        if not isinstance(obj, h5py.Group):
            raise InputError(f"{p}: '{clean_text(here)}' is a dataset, not a group, so '{shown}' does not exist")
        try:
            link = obj.get(name, getlink=True)
        except (KeyError, ValueError, OSError, RuntimeError, TypeError) as e:
            raise InputError(f"{p}: cannot read the link '{clean_text(here.rstrip('/') + '/' + name)}' "
                             f"({clean_text(str(e).split('(')[0].strip())})") from None
        full = clean_text(here.rstrip("/") + "/" + name)
        if link is None:
            if via is not None:
                raise InputError(f"{p}: '{shown}' is reached through the soft link '{via[0]}' -> '{via[1]}', "
                                 "which points to nothing in the file (a dangling link)")
            return None
        if isinstance(link, h5py.ExternalLink):
            raise InputError(f"{p}: '{full}' is an external link to '{clean_text(link.filename)}:"
                             f"{clean_text(link.path)}'; probeseq reads only data stored in the ion file itself "
                             "(copy the data into the file)")
        if isinstance(link, h5py.SoftLink):
            hops += 1
            if hops > _MAX_SOFT_LINKS:
                raise InputError(f"{p}: '{shown}' leads through more than {_MAX_SOFT_LINKS} soft links "
                                 f"(a loop at '{full}' -> '{clean_text(link.path)}')")
            via = (full, clean_text(link.path))
            target = [q for q in str(link.path).split("/") if q]
            if str(link.path).startswith("/"):
                obj, at = f["/"], []
            target.reverse()
            pending.extend(target)
            continue
        if not isinstance(link, h5py.HardLink):
            raise InputError(f"{p}: '{full}' is a link of a kind probeseq does not follow ({type(link).__name__})")
        try:
            obj = obj[name]
        except (KeyError, ValueError, OSError, RuntimeError) as e:
            raise InputError(f"{p}: cannot open '{full}' ({clean_text(str(e).split('(')[0].strip())}); "
                             "the file may be corrupted") from None
        at.append(name)
    return obj


def _h5_dataset(f, path: str, p: Path, label: str | None = None):
    """The dataset at ``path`` (see :func:`_h5_get`), checked by :func:`_check_h5_dataset`."""
    import h5py

    obj = _h5_get(f, path, p)
    label = label or clean_text(path)
    if obj is None:
        raise InputError(f"{p}: no dataset '{label}' in the file")
    if not isinstance(obj, h5py.Dataset):
        raise InputError(f"{p}: '{label}' is a group, not a dataset")
    _check_h5_dataset(obj, label, p)
    return obj


def _check_h5_dataset(d, label: str, p: Path) -> None:
    """Refuse datasets whose values are not numbers stored in this file (O(1): metadata only)."""
    kind = d.dtype.kind
    if kind == "b":
        raise InputError(f"{p}: '{label}' holds booleans, not numbers")
    if kind in "OSUT":
        raise InputError(f"{p}: '{label}' holds text, not numbers")
    if kind == "V":
        raise InputError(f"{p}: '{label}' holds compound records ({clean_text(str(d.dtype), 80)}), not plain numbers; "
                         "store each column as its own dataset")
    if kind not in "fiu":
        raise InputError(f"{p}: '{label}' holds {clean_text(str(d.dtype), 40)} values, not real numbers")
    if d.shape is None:
        raise InputError(f"{p}: '{label}' has no data (an empty dataspace)")
    try:
        dcpl = d.id.get_create_plist()
        n_external = dcpl.get_external_count()
        external = dcpl.get_external(0)[0] if n_external else b""
        virtual = d.is_virtual
        sources = d.virtual_sources() if virtual else []
        stored = d.id.get_storage_size() if not virtual else 1
    except (OSError, RuntimeError, ValueError) as e:
        raise InputError(f"{p}: cannot read the layout of '{label}' ({clean_text(str(e).split('(')[0].strip())}); "
                         "the file may be corrupted") from None
    if n_external:
        name = external.decode("utf-8", "replace") if isinstance(external, bytes) else str(external)
        raise InputError(f"{p}: '{label}' keeps its values in the separate raw file '{clean_text(name)}' (HDF5 "
                         "external storage); probeseq reads only data stored in the ion file itself")
    for src in sources:
        if src.file_name != ".":
            raise InputError(f"{p}: '{label}' is a virtual dataset mapping data from another file "
                             f"('{clean_text(src.file_name)}'); probeseq reads only data stored in the ion file itself")
    if len(d.shape) and d.shape[0] > 0 and stored == 0:
        raise InputError(f"{p}: '{label}' declares {d.shape[0]} rows but stores no values")


def _h5_layout(f, p: Path, position_dataset, mass_dataset):
    """Mapping column -> (dataset, column index or None), the file's length unit and the row count."""
    import h5py

    if position_dataset or mass_dataset:
        if not (position_dataset and mass_dataset):
            raise InputError(f"{p}: --position-dataset and --mass-dataset must be given together")
        pos = _h5_dataset(f, position_dataset, p)
        mass = _h5_dataset(f, mass_dataset, p)
        if pos.ndim != 2 or pos.shape[1] != 3:
            raise InputError(f"{p}: position dataset '{clean_text(position_dataset)}' must be N x 3, "
                             f"has shape {pos.shape}")
        if mass.ndim != 1 and not (mass.ndim == 2 and mass.shape[1] == 1):
            raise InputError(f"{p}: mass dataset '{clean_text(mass_dataset)}' must be 1-D, has shape {mass.shape}")
        if mass.shape[0] != pos.shape[0]:
            raise InputError(f"{p}: datasets of unequal length ('{clean_text(position_dataset)}' {pos.shape[0]} "
                             f"rows, '{clean_text(mass_dataset)}' {mass.shape[0]})")
        unit = _unit_attr(p, (pos, clean_text(position_dataset)), (f, "/"))
        layout = {"x": (pos, 0), "y": (pos, 1), "z": (pos, 2), "mass_to_charge": (mass, None)}
        return layout, unit, int(pos.shape[0])
    g = _h5_get(f, "/ions", p)
    if not isinstance(g, h5py.Group):
        if g is not None:
            raise InputError(f"{p}: '/ions' is a dataset, not a group of datasets x, y, z, mass_to_charge; for "
                             "another layout give --position-dataset and --mass-dataset")
        raise InputError(f"{p}: no group '/ions' (found: {_names(f)}); for another layout give "
                         "--position-dataset and --mass-dataset")
    present = {}
    for c in ALL_COLUMNS:
        try:
            present[c] = g.get(c, getlink=True) is not None
        except (KeyError, ValueError, OSError, RuntimeError, TypeError):
            present[c] = True  # _h5_dataset names the problem
    missing = [c for c in REQUIRED_COLUMNS if not present[c]]
    if missing:
        raise InputError(f"{p}: /ions lacks dataset(s) {', '.join(missing)}; found: {_names(g)}")
    layout = {}
    n = None
    first = None
    for c in ALL_COLUMNS:
        if not present[c]:
            continue
        d = _h5_dataset(f, f"/ions/{c}", p)
        if d.ndim != 1:
            raise InputError(f"{p}: /ions/{c} must be a 1-D dataset, has shape {d.shape}")
        if n is None:
            n, first = d.shape[0], c
        elif d.shape[0] != n:
            raise InputError(f"{p}: datasets of unequal length (/ions/{first} has {n} rows, /ions/{c} has "
                             f"{d.shape[0]})")
        layout[c] = (d, None)
    unit = _unit_attr(p, (g, "/ions"), (f, "/"))
    return layout, unit, int(n)


def _names(g, k: int = 10) -> str:
    """The first ``k`` member names of a group, for messages."""
    try:
        names = []
        for name in g:
            names.append(clean_text(name, 40))
            if len(names) > k:
                break
    except (KeyError, ValueError, OSError, RuntimeError):
        return "unreadable"
    if not names:
        return "nothing"
    return ", ".join(sorted(names[:k])) + (", ..." if len(names) > k else "")


def _unit_attr(p: Path, *holders) -> str:
    """The ``length_unit`` attribute of the first holder (object, name) that has it; ``"nm"`` if none."""
    for obj, name in holders:
        try:
            if "length_unit" not in obj.attrs:
                continue
            v = obj.attrs["length_unit"]
        except (UnicodeDecodeError, OSError, KeyError, ValueError, TypeError, RuntimeError) as e:
            why = "not UTF-8 text" if isinstance(e, UnicodeDecodeError) else clean_text(str(e).split("(")[0].strip())
            raise InputError(f"{p}: attribute length_unit of '{name}' cannot be read ({why}); expected 'nm' or "
                             "'angstrom'") from None
        return _as_str(v, f"{p}: attribute length_unit of '{name}'")
    return "nm"


def _as_str(v, where: str = "attribute") -> str:
    """An attribute value as text: str, UTF-8 bytes, or a one-element array of those."""
    if isinstance(v, np.ndarray):
        if v.size != 1:
            raise InputError(f"{where} must be one text value such as 'nm', holds an array of shape {v.shape}")
        v = v.reshape(-1)[0]
    if isinstance(v, np.void):
        raise InputError(f"{where} must be text such as 'nm', holds opaque or compound data")
    if isinstance(v, (bytes, np.bytes_)):
        try:
            return bytes(v).decode("utf-8")
        except UnicodeDecodeError:
            raise InputError(f"{where} is not UTF-8 text ({clean_text(repr(bytes(v)[:20]))}); expected 'nm' or "
                             "'angstrom'") from None
    return str(v)


@contextmanager
def _h5_source(p: Path, length_unit, position_dataset, mass_dataset):
    """Open an HDF5 ion file and yield (layout, length unit, factor to nm, number of rows)."""
    with _open_h5(p) as f:
        layout, unit_in_file, n = _h5_layout(f, p, position_dataset, mass_dataset)
        unit = length_unit or unit_in_file
        factor = _check_unit(unit, str(p))
        if n == 0:
            raise InputError(f"{p}: the ion datasets are empty")
        yield layout, unit, factor, n


def _read_block(layout, start, stop, p: Path):
    cols = {}
    try:
        for c, (d, j) in layout.items():
            if j is None:
                a = d[start:stop]
                cols[c] = a.reshape(-1) if a.ndim == 2 else a
            else:
                cols[c] = d[start:stop, j]
    except OSError as e:
        raise InputError(f"{p}: could not read rows {start}-{stop} ({str(e).split('(')[0].strip()}); "
                         "the file may be truncated or corrupted") from None
    return cols


def _read_into(layout, cols, n, p: Path, step: int = DEFAULT_CHUNK):
    """Read every column of ``layout`` into the preallocated arrays ``cols`` without temporaries."""
    try:
        for c, (d, j) in layout.items():
            out = cols[c]
            if j is None and d.ndim == 1 and d.dtype == out.dtype:
                d.read_direct(out)  # straight into the destination: no temporary
            else:
                for s in range(0, n, step):
                    e = min(n, s + step)
                    a = d[s:e] if j is None else d[s:e, j]
                    out[s:e] = a.reshape(-1)
    except OSError as e:
        raise InputError(f"{p}: could not read the ion datasets ({str(e).split('(')[0].strip()}); "
                         "the file may be truncated or corrupted") from None


class IonSource:
    """An HDF5 ion file opened for block reads of x, y, z and mass_to_charge into caller buffers.

    Plain layouts (1-D little-endian float datasets, contiguous or chunked, no filters, every chunk
    stored) are read straight from the file with positioned reads (``os.preadv``: no HDF5 layer,
    no temporaries, the GIL released), at the offsets HDF5 reports for the chunks; any other
    layout (compressed, integer or N x 3 datasets...) goes through h5py. Positions stay in the
    file's unit: multiply by :attr:`factor` for nm.

    Parameters
    ----------
    path : str or Path
    length_unit, position_dataset, mass_dataset
        As for :func:`read_ions`.

    Attributes
    ----------
    n : int
        Rows in the file.
    unit : str
        Length unit of the positions in the file.
    factor : float
        Factor from that unit to nm.
    xyz_dtype, m_dtype : numpy dtype
        float32 when the datasets are float32, otherwise float64.
    raw : bool
        Whether the direct (positioned-read) path is used.

    Examples
    --------
    >>> with IonSource("run.h5") as src:                    # doctest: +SKIP
    ...     bufs = src.buffers(1 << 20)
    ...     src.read(0, 1 << 20, bufs)
    """

    COLUMNS = ("x", "y", "z", "mass_to_charge")

    def __init__(self, path, length_unit=None, position_dataset=None, mass_dataset=None):
        self.path = _check_file(path)
        if ion_file_kind(self.path) != "hdf5":
            raise InputError(f"{self.path}: block reads need an HDF5 file (.h5, .hdf5)")
        _check_read_options(self.path, "hdf5", length_unit, position_dataset, mass_dataset)
        self._f = _open_h5(self.path)
        try:
            self._layout, unit_in_file, self.n = _h5_layout(self._f, self.path, position_dataset, mass_dataset)
            self.unit = length_unit or unit_in_file
            self.factor = _check_unit(self.unit, str(self.path))
            if self.n == 0:
                raise InputError(f"{self.path}: the ion datasets are empty")
            dts = {c: _read_dtype(self._layout[c][0].dtype) for c in self.COLUMNS}
            self.xyz_dtype = np.dtype(np.float32) if all(dts[c] == np.float32 for c in "xyz") else np.dtype(np.float64)
            self.m_dtype = dts["mass_to_charge"]
            self._raw = self._raw_plan()
        except BaseException:
            self._f.close()
            raise
        self.raw = self._raw is not None
        self._fd = os.open(self.path, os.O_RDONLY | getattr(os, "O_BINARY", 0)) if self.raw else None

    # ------------------------------------------------------------------ layout
    def _raw_plan(self):
        """Per column: sorted chunk row starts, byte offsets and rows per chunk; None if not plain."""
        import h5py

        if not hasattr(os, "preadv"):
            return None
        size = self.path.stat().st_size
        plan = {}
        for c in self.COLUMNS:
            d, j = self._layout[c]
            want = self.xyz_dtype if c != "mass_to_charge" else self.m_dtype
            if j is not None or d.ndim != 1 or d.dtype != want or d.dtype.byteorder not in ("<", "=") \
                    or np.dtype("=f4").byteorder != "=" or not np.little_endian or d.is_virtual:
                return None
            dcpl = d.id.get_create_plist()
            if dcpl.get_nfilters() != 0 or dcpl.get_external_count() != 0:
                return None
            item = d.dtype.itemsize
            layout = dcpl.get_layout()
            if layout == h5py.h5d.CONTIGUOUS:
                off = d.id.get_offset()
                if off is None or off + self.n * item > size:
                    return None
                plan[c] = (np.array([0], np.int64), np.array([off], np.int64), self.n)
            elif layout == h5py.h5d.CHUNKED:
                rows = int(d.chunks[0])
                nch = -(-self.n // rows)
                if d.id.get_num_chunks() != nch:
                    return None  # unallocated chunks (fill values) are left to HDF5
                starts = np.empty(nch, np.int64)
                offs = np.empty(nch, np.int64)
                for i in range(nch):
                    info = d.id.get_chunk_info(i)
                    if info.filter_mask != 0 or info.size != rows * item or info.byte_offset + info.size > size:
                        return None
                    starts[i] = info.chunk_offset[0]
                    offs[i] = info.byte_offset
                order = np.argsort(starts)
                starts, offs = starts[order], offs[order]
                if not np.array_equal(starts, np.arange(nch, dtype=np.int64) * rows):
                    return None
                plan[c] = (starts, offs, rows)
            else:
                return None
        return plan

    # ------------------------------------------------------------------ reading
    def buffers(self, rows: int) -> dict:
        """Empty arrays for blocks of up to ``rows`` ions, one per column, in the read dtypes."""
        return {c: np.empty(int(rows), self.xyz_dtype if c != "mass_to_charge" else self.m_dtype)
                for c in self.COLUMNS}

    def read(self, start: int, stop: int, out: dict) -> dict:
        """Read rows ``start:stop`` of every column into ``out[c][:stop - start]``; returns the views."""
        start, stop = int(start), int(stop)
        if not 0 <= start <= stop <= self.n:
            raise InputError(f"{self.path}: rows {start}-{stop} outside 0-{self.n}")
        k = stop - start
        views = {c: out[c][:k] for c in self.COLUMNS}
        if k == 0:
            return views
        if self._raw is not None:
            for c in self.COLUMNS:
                self._read_raw(c, start, stop, views[c])
            return views
        try:
            for c in self.COLUMNS:
                d, j = self._layout[c]
                v = views[c]
                if j is None and d.ndim == 1 and d.dtype == v.dtype:
                    d.read_direct(v, np.s_[start:stop], np.s_[0:k])
                else:
                    a = d[start:stop] if j is None else d[start:stop, j]
                    v[...] = a.reshape(-1)
        except OSError as e:
            raise InputError(f"{self.path}: could not read rows {start}-{stop} ({str(e).split('(')[0].strip()}); "
                             "the file may be truncated or corrupted") from None
        return views

    def _read_raw(self, c, start, stop, view):
        starts, offs, rows = self._raw[c]
        item = view.dtype.itemsize
        mv = memoryview(view).cast("B")
        pos = 0
        r = start
        i = int(np.searchsorted(starts, r, side="right")) - 1
        while r < stop:
            cs = int(starts[i])
            ce = min(cs + rows, self.n)
            e = min(stop, ce)
            nbytes = (e - r) * item
            off = int(offs[i]) + (r - cs) * item
            done = 0
            while done < nbytes:
                got = os.preadv(self._fd, [mv[pos + done:pos + nbytes]], off + done)
                if got <= 0:
                    raise InputError(f"{self.path}: could not read rows {r}-{e} of '{c}' (the file ends early); "
                                     "the file may be truncated or corrupted")
                done += got
            pos += nbytes
            r = e
            i += 1

    def block_bounds(self, max_rows: int) -> list:
        """Row ranges ``(start, stop)`` of at most ``max_rows`` rows covering the file in order.

        With the direct path each range lies inside one stored chunk of every column, so
        :meth:`mapped` can serve it without copying.
        """
        max_rows = max(1, int(max_rows))
        cuts = {0, self.n}
        if self._raw is not None:
            for c in self.COLUMNS:
                starts, _, rows = self._raw[c]
                cuts.update(int(v) for v in starts)
                cuts.update(int(v) + rows for v in starts if int(v) + rows < self.n)
        cuts = sorted(cuts)
        out = []
        for a, b in zip(cuts[:-1], cuts[1:]):
            for s in range(a, b, max_rows):
                out.append((s, min(b, s + max_rows)))
        return out

    @contextmanager
    def mapped(self, start: int, stop: int):
        """Zero-copy views of rows ``start:stop`` of every column, read from the page cache through
        a memory map of just those bytes (unmapped on exit, so resident memory stays bounded).

        Yields a dict of arrays, or None when the direct path is not available or the range crosses
        a stored chunk (use :meth:`read` then).
        """
        import mmap

        if self._raw is None or not hasattr(mmap, "MAP_SHARED") or stop <= start:
            yield None
            return
        maps, views = [], {}
        try:
            for c in self.COLUMNS:
                starts, offs, rows = self._raw[c]
                i = int(np.searchsorted(starts, start, side="right")) - 1
                cs = int(starts[i])
                if stop > min(cs + rows, self.n):
                    views = None
                    break
                dt = self.xyz_dtype if c != "mass_to_charge" else self.m_dtype
                off = int(offs[i]) + (start - cs) * dt.itemsize
                base = off - off % mmap.ALLOCATIONGRANULARITY
                length = off - base + (stop - start) * dt.itemsize
                # no MAP_POPULATE: Python holds the GIL through the whole mmap call (stalling the other
                # threads); the pages fault in inside the compiled kernels, which release it
                mm = mmap.mmap(self._fd, length, flags=mmap.MAP_SHARED, prot=mmap.PROT_READ, offset=base)
                maps.append(mm)
                views[c] = np.frombuffer(mm, dtype=dt, count=stop - start, offset=off - base)
            yield views
        finally:
            views = None
            for mm in maps:
                try:
                    mm.close()
                except BufferError:  # a view is still referenced elsewhere: unmapped when it goes
                    pass

    # ------------------------------------------------------------------ context
    def close(self):
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
        if self._f is not None:
            self._f.close()
            self._f = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False


def sample_blocks(n: int, n_blocks: int, block_rows: int) -> np.ndarray:
    """Start rows of ``n_blocks`` contiguous blocks of ``block_rows`` rows spread evenly over ``n`` rows.

    The first block starts at row 0 and the last ends at row ``n``; when the blocks would cover
    the rows anyway, one block of all rows is returned. Ions are stored in acquisition order, so
    each block is a thin depth slice of the whole cross-section.
    """
    n, n_blocks, block_rows = int(n), int(n_blocks), int(block_rows)
    if n_blocks < 1 or block_rows < 1:
        raise InputError(f"sample_blocks: n_blocks and block_rows must be >= 1, got {n_blocks}, {block_rows}")
    if n <= n_blocks * block_rows:
        return np.zeros(1, np.int64)
    if n_blocks == 1:
        return np.array([(n - block_rows) // 2], np.int64)
    return (np.arange(n_blocks, dtype=np.int64) * (n - block_rows)) // (n_blocks - 1)


def read_ion_sample(source: IonSource, n_blocks: int, block_rows: int, strict: bool = False, meta=None):
    """Read the blocks of :func:`sample_blocks` from an open :class:`IonSource` as one IonList.

    Returns
    -------
    sample : IonList
        Positions in nm; invalid rows dropped (counted in ``meta.dropped``) or, with ``strict``,
        an :class:`InputError`.
    starts : (n_blocks,) ndarray of int64
        First row of each block; every block has ``min(block_rows, n)`` rows.
    """
    n = source.n
    starts = sample_blocks(n, n_blocks, block_rows)
    rows = n if starts.size == 1 and n <= n_blocks * block_rows else int(block_rows)
    total = rows * starts.size
    cols = source.buffers(total)
    for b, s in enumerate(starts):
        s = int(s)
        part = {c: v[b * rows:(b + 1) * rows] for c, v in cols.items()}
        source.read(s, s + rows, part)
    if strict:
        from .ions import valid_rows

        finite, positive = valid_rows(cols)
        bad = np.flatnonzero(~(finite & positive))
        if bad.size:
            b = int(bad[0])
            row = int(starts[b // rows]) + b % rows
            what = "NaN or infinite values" if not finite[b] else "a non-positive mass_to_charge"
            raise InputError(f"{source.path}: data row {row + 1} holds {what} (--strict)")
    meta = meta or IonMeta(str(source.path), "", source.unit)
    sample = _finish(cols, source.factor, meta, False, f"{source.path} (sample)")
    return sample, starts


def count_ions(path, position_dataset=None, mass_dataset=None) -> int:
    """Number of rows in an HDF5 ion file without reading the data."""
    p = _check_file(path)
    with _open_h5(p) as f:
        return _h5_layout(f, p, position_dataset, mass_dataset)[2]


def iter_ion_chunks(path, chunk_size: int = DEFAULT_CHUNK, length_unit: str | None = None,
                    position_dataset: str | None = None, mass_dataset: str | None = None,
                    strict: bool = False, checksum: bool = False) -> Iterator[IonList]:
    """Stream an ion file as :class:`IonList` chunks of at most ``chunk_size`` rows.

    HDF5 files are read slice by slice, so memory is bounded by the chunk; text files are read
    whole and then sliced (convert large text files to HDF5 once with ``write_ions``).
    """
    p = _check_file(path)
    kind = ion_file_kind(p)
    _check_read_options(p, kind, length_unit, position_dataset, mass_dataset)
    if chunk_size < 1:
        raise InputError(f"chunk_size must be >= 1, got {chunk_size}")
    if kind == "text":
        ions = read_ions(p, length_unit=length_unit or "nm", strict=strict, checksum=checksum)
        for s in range(0, max(len(ions), 1), chunk_size):
            yield ions.subset(slice(s, s + chunk_size))
        return
    sha = file_sha256(p) if checksum else ""
    with _h5_source(p, length_unit, position_dataset, mass_dataset) as (layout, unit, factor, n):
        for s in range(0, n, chunk_size):
            cols = _read_block(layout, s, min(n, s + chunk_size), p)
            yield _finish(cols, factor, IonMeta(str(p), sha, unit), strict, f"{p} rows {s + 1}-{min(n, s + chunk_size)}")


def _check_read_options(p: Path, kind: str, length_unit, position_dataset, mass_dataset) -> None:
    """Refuse reading options that are given but empty or unknown, and HDF5 dataset paths given
    for a text file (they would be silently ignored)."""
    if length_unit is not None:
        _check_unit(length_unit, f"{p}: --length-unit")
    for name, v in (("--position-dataset", position_dataset), ("--mass-dataset", mass_dataset)):
        if v is not None and not str(v).strip():
            raise InputError(f"{p}: {name} is empty; give an HDF5 dataset path such as /data/positions")
    if kind == "text" and (position_dataset or mass_dataset):
        raise InputError(f"{p}: --position-dataset and --mass-dataset name HDF5 datasets; a text ion file names "
                         "its columns in its header (x, y, z, mass_to_charge)")


def _finish(cols, factor, meta, strict, where) -> IonList:
    for c in ("x", "y", "z"):
        if factor != 1.0:
            cols[c] = cols[c] * cols[c].dtype.type(factor)
    return IonList.from_arrays(meta=meta, strict=strict, where=where, **cols)


def read_ions(path, length_unit: str | None = None, position_dataset: str | None = None,
              mass_dataset: str | None = None, strict: bool = False, checksum: bool = True) -> IonList:
    """Read an ion list from CSV/TSV text or HDF5.

    Parameters
    ----------
    path : str or Path
        ``.csv``, ``.tsv``/``.txt`` or ``.h5``/``.hdf5``.
    length_unit : {"nm", "angstrom"}, optional
        Unit of the positions in the file. Text files: default nm. HDF5: default the file's
        ``length_unit`` attribute (nm when absent); given, it overrides the attribute.
    position_dataset, mass_dataset : str, optional
        HDF5 paths of an N x 3 position dataset and a mass-to-charge dataset, for files that do not
        use the ``/ions`` layout.
    strict : bool
        Raise on NaN/inf values or non-positive mass-to-charge instead of dropping the rows.
    checksum : bool
        Compute the file's SHA-256 for the provenance (costs one extra read of the file).

    Returns
    -------
    IonList
        Positions in nm, mass-to-charge in Da, with provenance in ``meta``.
    """
    p = _check_file(path)
    kind = ion_file_kind(p)
    _check_read_options(p, kind, length_unit, position_dataset, mass_dataset)
    if kind == "text":
        unit = length_unit or "nm"
        factor = _check_unit(unit, str(p))
        cols = _read_text(p, unit, strict)
        sha = file_sha256(p) if checksum else ""
        ions = _finish(cols, factor, IonMeta(str(p), sha, unit), strict, str(p))
    else:
        sha = file_sha256(p) if checksum else ""
        with _h5_source(p, length_unit, position_dataset, mass_dataset) as (layout, unit, factor, n):
            cols = {}
            for c, (d, j) in layout.items():
                cols[c] = np.empty(n, dtype=_read_dtype(d.dtype))
            _read_into(layout, cols, n, p)
            ions = _finish(cols, factor, IonMeta(str(p), sha, unit), strict, str(p))
    if len(ions) == 0:
        raise InputError(f"{p}: no valid ions (all {ions.meta.n_dropped} rows dropped: {ions.meta.dropped})")
    _warn_dropped(ions, str(p))
    return ions


# ---------------------------------------------------------------------- writers
def write_ions(ions: IonList, path, fmt: str | None = None, compression: str | None = None,
               chunk_rows: int = 1_000_000, float_format: str = "%.6g", dtype=None, mark: bool = False) -> Path:
    """Write an ion list as CSV/TSV text or HDF5 (positions in nm).

    The file is written to a temporary name beside the target and moved into place when complete,
    so an interrupted write never leaves a half file under the target name.

    Parameters
    ----------
    fmt : {"csv", "tsv", "hdf5"}, optional
        Default from the extension.
    compression : {None, "gzip", "lzf"}
        HDF5 compression (uncompressed reads fastest).
    chunk_rows : int
        HDF5 chunk length in rows.
    dtype : numpy dtype, optional
        HDF5 dataset dtype (default: the arrays' own).
    mark : bool
        Carry probeseq's mark (:data:`probeseq.outputs.MARK`), which lets ``--force`` replace the
        file later: only for data probeseq made up (the simulator), never for a converted
        measurement, which must stay irreplaceable.
    """
    from .outputs import MARK

    p = Path(path)
    if fmt is None:
        kind = ion_file_kind(p)
        fmt = "hdf5" if kind == "hdf5" else ("csv" if p.suffix.lower() == ".csv" else "tsv")
    fmt = fmt.lower()
    if fmt not in ("csv", "tsv", "hdf5"):
        raise InputError(f"unknown ion file format '{fmt}' (expected csv, tsv or hdf5)")
    if compression not in (None, "gzip", "lzf"):
        raise InputError(f"unknown compression '{compression}' (expected gzip or lzf)")
    p.parent.mkdir(parents=True, exist_ok=True)
    tmp = p.with_name(f".{p.name}.part{os.getpid()}")
    cols = ions.columns
    try:
        if fmt == "hdf5":
            import h5py

            n = len(ions)
            with h5py.File(tmp, "w") as f:
                if mark:
                    f.attrs["written_by"] = MARK
                g = f.create_group("ions")
                g.attrs["length_unit"] = "nm"
                g.attrs["mass_to_charge_unit"] = "Da"
                for c, a in cols.items():
                    kw = {}
                    if n:
                        kw["chunks"] = (min(chunk_rows, n),)
                        if compression:
                            kw["compression"] = compression
                    d = g.create_dataset(c, data=a if dtype is None else a.astype(dtype), **kw)
                    d.attrs["unit"] = {"x": "nm", "y": "nm", "z": "nm", "mass_to_charge": "Da",
                                       "voltage": "V"}.get(c, "1")
        else:
            import pandas as pd

            sep = "," if fmt == "csv" else "\t"
            with open(tmp, "w", encoding="utf-8", newline="") as fh:
                fh.write(f"# ion list{', ' + MARK if mark else ''}; positions in nm, mass_to_charge in Da\n")
                pd.DataFrame(cols).to_csv(fh, sep=sep, index=False, float_format=float_format)
        os.replace(tmp, p)
    finally:
        if tmp.exists():
            tmp.unlink()
    return p
