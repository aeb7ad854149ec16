"""Readers and writers of ion lists in open formats: CSV/TSV text and HDF5.

Text (``.csv``; ``.tsv`` and ``.txt`` tab-separated): lines starting with ``#`` are comments, then
one header row, then one ion per row. Required columns ``x, y, z, mass_to_charge``; optional
``multiplicity, pulse_number, dc_voltage_v`` (older files' ``pulse``, ``voltage`` are read too); other columns are ignored. Header names are matched without
regard to case or surrounding spaces.

HDF5 (``.h5``, ``.hdf5``): group ``/ions`` with 1-D datasets ``x, y, z, mass_to_charge`` (float32
or float64, equal length; optional ``multiplicity, pulse_number, dc_voltage_v``) and the attribute
``length_unit`` (``"nm"`` or ``"angstrom"``; nm when absent). Any other layout is read with
``position_dataset`` (an N x 3 dataset) and ``mass_dataset``. Reading is chunked: see
:func:`iter_ion_chunks` for streaming files larger than memory, and :class:`IonSource` for block
reads into caller buffers (or zero-copy views of the page cache) of plain layouts without the HDF5
layer, as the streamed analysis uses them (:func:`read_ion_sample` for its sample of depth blocks).

Positions are converted to nm once, here. Rows with NaN/inf values or non-positive mass-to-charge
are dropped and counted in :class:`~probeseq.io.ions.IonMeta` (``strict=True`` makes them an error);
positions beyond +-:data:`~probeseq.io.ions.MAX_ABS_POSITION_NM` (1e5 nm) are refused as a unit or
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

import hashlib
import os
import warnings
from pathlib import Path

import numpy as np

from ..exceptions import DataQualityWarning, InputError
from ..utils.tomlfile import clean_text
from .ions import LENGTH_UNITS, OPTIONAL_COLUMNS, REQUIRED_COLUMNS, IonList

__all__ = ['file_sha256', 'file_sha256_mapped', 'ion_file_kind']

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
