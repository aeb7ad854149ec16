"""Reading ion files: one :class:`IonSource` over text and HDF5 files, with blocks, samples and
chunks; whole-file reading into an :class:`~probeseq.io.ions.IonList`, and writing one.
"""

from __future__ import annotations

import os
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

import numpy as np

from ..exceptions import InputError
from .formats import DEFAULT_CHUNK, _check_file, _check_unit, _read_dtype, _warn_dropped, file_sha256, ion_file_kind
from .hdf5 import _h5_layout, _h5_source, _open_h5
from .ions import IonList, IonMeta
from .text import _read_text

__all__ = ['read_ions', 'write_ions', 'iter_ion_chunks', 'count_ions', 'IonSource', 'sample_blocks', 'read_ion_sample']

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
        Carry probeseq's mark (:data:`probeseq.utils.marks.MARK`), which lets ``--force`` replace the
        file later: only for data probeseq made up (the simulator), never for a converted
        measurement, which must stay irreplaceable.
    """
    from ..utils.marks import MARK

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
                                       "dc_voltage_v": "V"}.get(c, "1")
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
