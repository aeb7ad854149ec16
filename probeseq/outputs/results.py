"""The analysis folder's tables and files: tracks, runs, decoded posteriors, bootstrap
replicates and results.json readers.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..exceptions import InputError
from ..lattice.correction import file_site_positions
from ..lattice.rodcolumns import RodColumns

__all__ = ['RESULTS_SCHEMA_VERSION', 'DecodedTracks', 'save_decoded', 'load_decoded', 'read_replicates', 'load_results',
           'TRACKS_COLUMNS', 'RUNS_COLUMNS', 'TRACKS_TABLE_CHOICES', 'tracks_table_files', 'write_tracks_h5']

#: version of the results.json layout; bumped when a key changes meaning or moves
RESULTS_SCHEMA_VERSION = 1


TRACKS_COLUMNS = ("rod", "rod_x_nm", "rod_y_nm", "site", "z_nm", "state", "posterior")


RUNS_COLUMNS = ("rod", "first_site", "last_site", "length_sites", "length_nm", "z_start_nm", "z_end_nm",
                "metal", "mean_posterior")


TRACKS_FORMATS = {"rod": "%d", "rod_x_nm": "%.4f", "rod_y_nm": "%.4f", "site": "%d", "z_nm": "%.4f",
                  "posterior": "%.4f"}


RUNS_FORMATS = {"length_nm": "%.4f", "z_start_nm": "%.4f", "z_end_nm": "%.4f", "mean_posterior": "%.4f"}


def tracks_table(columns: RodColumns, decoded, select=None, rods: slice | None = None,
                 state_codes: bool = False) -> dict:
    """One row per decoded site (the columns of ``tracks.csv``) as 1-D arrays.

    Parameters
    ----------
    columns : RodColumns
    decoded : DecodeResult or DecodedTracks
    select : (n_rods, n_sites) ndarray of bool, optional
        Sites to include (default: every used site, ``columns.mask``).
    rods : slice, optional
        Only these rods (a block of the table; see :func:`write_tracks`).
    state_codes : bool
        ``state`` as the metal's index (int8) instead of its name.

    Notes
    -----
    ``state`` is the site call: the metal of largest posterior at the site (the first metal on a
    tie), the decode with the fewest expected wrong sites, and ``posterior`` its posterior. The runs
    (:func:`runs_table`) are those of the most probable path (Viterbi), a sequence the fitted chain
    can make as a whole; the two differ at some uncertain sites.
    """
    sel = columns.mask if select is None else select
    if rods is None:
        r, s = np.nonzero(sel)
    else:
        r, s = np.nonzero(sel[rods])
        r += rods.indices(sel.shape[0])[0]
    xy, z = file_site_positions(columns, r, s)  # in the ion file's frame
    post = np.asarray(decoded.posteriors[r, s])
    state = post.argmax(axis=1)  # the site call
    names = state.astype(np.int8) if state_codes else np.asarray(columns.metals, dtype=object)[state]
    return {"rod": r, "rod_x_nm": xy[:, 0], "rod_y_nm": xy[:, 1], "site": s, "z_nm": z,
            "state": names, "posterior": post.max(axis=1)}


def runs_table(columns: RodColumns, decoded) -> dict:
    """Runs of equal metal along each rod's Viterbi path (the columns of ``runs.csv``)."""
    runs = decoded.runs
    first, last = np.asarray(runs["first_site"], int), np.asarray(runs["last_site"], int)
    length = np.asarray(runs["length"], int)
    rod = np.asarray(runs["rod"], int)
    z_ends = file_site_positions(columns, np.r_[rod, rod], np.r_[first, last])[1]  # the file's frame
    return {"rod": rod, "first_site": first, "last_site": last,
            "length_sites": length, "length_nm": length * columns.pitch_nm,
            "z_start_nm": z_ends[:rod.size], "z_end_nm": z_ends[rod.size:],
            "metal": np.asarray(columns.metals, dtype=object)[np.asarray(runs["metal"], int)],
            "mean_posterior": np.asarray(runs["mean_posterior"], float)}


def write_tracks(path, columns: RodColumns, decoded, rods_per_block: int = 1024):
    """Write ``tracks.csv`` a block of rods at a time (bounded memory, compiled formatting)."""
    from .tables import write_csv

    n = columns.n_rods
    blocks = (tracks_table(columns, decoded, rods=slice(b, min(n, b + rods_per_block)))
              for b in range(0, n, rods_per_block))
    write_csv(path, blocks, TRACKS_COLUMNS, TRACKS_FORMATS)


#: ``--tracks-table auto`` writes tracks.csv up to this many rows (about 50 MB of text), tracks.h5 above
TRACKS_CSV_MAX_ROWS = 2_000_000

#: the ways of writing the tracks table: ``auto`` (CSV up to TRACKS_CSV_MAX_ROWS rows, else HDF5),
#: ``csv``, ``hdf5`` or ``both``
TRACKS_TABLE_CHOICES = ("auto", "csv", "hdf5", "both")

#: unit of each tracks-table column (tracks.h5 stores it as the dataset's ``unit`` attribute)
TRACKS_UNITS = {"rod": "1", "rod_x_nm": "nm", "rod_y_nm": "nm", "site": "1", "z_nm": "nm", "state": "metal",
                "posterior": "probability"}


def tracks_table_files(choice: str, n_rows: int) -> tuple:
    """The files holding the tracks table: a tuple of ``"tracks.csv"`` and/or ``"tracks.h5"``.

    Parameters
    ----------
    choice : {"auto", "csv", "hdf5", "both"}
        ``auto``: ``tracks.csv`` up to :data:`TRACKS_CSV_MAX_ROWS` rows, ``tracks.h5`` above.
    n_rows : int
        Rows of the table (decoded sites).
    """
    from ..exceptions import InputError

    if choice not in TRACKS_TABLE_CHOICES:
        raise InputError(f"--tracks-table {choice!r}: choose one of {', '.join(TRACKS_TABLE_CHOICES)}")
    if choice == "auto":
        return ("tracks.csv",) if n_rows <= TRACKS_CSV_MAX_ROWS else ("tracks.h5",)
    return {"csv": ("tracks.csv",), "hdf5": ("tracks.h5",), "both": ("tracks.csv", "tracks.h5")}[choice]


def write_tracks_h5(path, columns: RodColumns, decoded, rods_per_block: int = 4096):
    """Write the tracks table (the rows and columns of ``tracks.csv``) as HDF5 group ``/tracks``.

    One 1-D dataset per column of :data:`TRACKS_COLUMNS`, each with a ``unit`` attribute: ``rod``
    and ``site`` int32, ``rod_x_nm``, ``rod_y_nm``, ``z_nm`` (nm, the ion file's frame) and
    ``posterior`` float32, ``state`` an HDF5 enumeration of the metals (int8 codes in the order of
    the group's ``metals`` attribute). Uncompressed, written a block of rods at a time: about 25
    bytes per row, read with h5py alone (``{k: f["tracks"][k][:] for k in f["tracks"]}``).
    """
    import h5py

    from ..utils.marks import MARK

    n_rows = int(np.count_nonzero(columns.mask))
    metals = list(columns.metals)
    state_dt = h5py.enum_dtype({m: i for i, m in enumerate(metals)}, basetype="i1")
    dtypes = {"rod": np.int32, "rod_x_nm": np.float32, "rod_y_nm": np.float32, "site": np.int32,
              "z_nm": np.float32, "state": state_dt, "posterior": np.float32}
    with h5py.File(path, "w") as f:
        f.attrs["written_by"] = MARK
        g = f.create_group("tracks")
        g.attrs["about"] = ("one row per decoded site, the columns of tracks.csv; state codes index the metals "
                            "attribute")
        g.attrs["metals"] = json.dumps(metals)
        ds = {}
        for c in TRACKS_COLUMNS:
            ds[c] = g.create_dataset(c, shape=(n_rows,), dtype=dtypes[c])
            ds[c].attrs["unit"] = TRACKS_UNITS[c]
        pos = 0
        n = columns.n_rods
        for b in range(0, n, rods_per_block):
            t = tracks_table(columns, decoded, rods=slice(b, min(n, b + rods_per_block)), state_codes=True)
            m = len(t["rod"])
            for c in TRACKS_COLUMNS:
                ds[c][pos:pos + m] = np.asarray(t[c]).astype(ds[c].dtype if c != "state" else np.int8, copy=False)
            pos += m


def _fast_formats(table: dict, columns, fmt: dict) -> bool:
    """Whether the compiled formatter writes this table exactly as printf would: every float
    column has a fixed-point format and the other columns are integers or text."""
    for c in columns:
        kind = np.asarray(table[c][:0] if hasattr(table[c], "dtype") else table[c]).dtype.kind
        f = fmt.get(c)
        if kind == "f" and not (f and f.startswith("%.") and f.endswith("f") and f[2:-1].isdigit()):
            return False
        if kind not in "fiubOU" or (kind in "iub" and f not in (None, "%d")):
            return False
        if kind in "OU" and f not in (None, "%s"):
            return False
    return True


def _write_table(path: Path, table: dict, columns, fmt: dict | None = None, comment: str | None = None):
    """Write columns of equal length as CSV, floats with the given printf formats.

    ``comment`` is written first as one ``# ...`` line (readers that skip comments ignore it).

    Rows are formatted in blocks, so memory stays bounded for tables of tens of millions of rows;
    tables of fixed-point floats, integers and text go through the compiled formatter of
    :mod:`probeseq.outputs.tables`.
    """
    fmt = fmt or {}
    if all(isinstance(table[c], np.ndarray) for c in columns) and _fast_formats(table, columns, fmt):
        from .tables import write_csv

        write_csv(path, [table], list(columns), fmt, comment=comment)
        return
    cols = [np.asarray(table[c]) for c in columns]
    row = ",".join(fmt.get(c, "%s") for c in columns) + "\n"
    with open(path, "w", encoding="utf-8", newline="") as fh:
        if comment is not None:
            fh.write(f"# {comment}\n")
        fh.write(",".join(columns) + "\n")
        n = len(cols[0]) if cols else 0
        step = 200_000
        for s0 in range(0, n, step):
            block = [c[s0:s0 + step].tolist() for c in cols]
            fh.write("".join(row % r for r in zip(*block)))


def save_decoded(decoded, path):
    """Viterbi paths, posteriors, mask and uncertainty flags of a decoding (HDF5 ``/decoded``)."""
    import h5py

    from ..utils.marks import h5_compression

    with h5py.File(path, "w") as f:
        g = f.create_group("decoded")
        g.attrs["metals"] = json.dumps(list(decoded.metals))
        g.attrs["uncertain_below"] = float(decoded.uncertain_below)
        for name, data, unit in (("viterbi", decoded.viterbi.astype(np.int8, copy=False), "metal index, -1 = masked"),
                                 ("posteriors", decoded.posteriors.astype(np.float32, copy=False), "probability"),
                                 ("mask", np.ascontiguousarray(decoded.mask).view(np.uint8), "1 = site used"),
                                 ("uncertain", np.ascontiguousarray(decoded.uncertain).view(np.uint8), "1 = best posterior below uncertain_below"),
                                 ("stationary", np.asarray(decoded.stationary, float), "probability"),
                                 ("transmat", np.asarray(decoded.transmat, float), "probability")):
            d = g.create_dataset(name, data=data, **h5_compression(int(data.size)))
            d.attrs["unit"] = unit


@dataclass(frozen=True)
class DecodedTracks:
    """The per-site part of a decoding, as read back from ``decoded.h5``."""

    metals: tuple
    viterbi: np.ndarray
    posteriors: np.ndarray
    mask: np.ndarray
    uncertain: np.ndarray
    stationary: np.ndarray
    transmat: np.ndarray
    uncertain_below: float


def load_decoded(path) -> DecodedTracks:
    """Read ``decoded.h5`` written by :func:`save_decoded`, checking what it reads.

    Checked: the group and every dataset (type and shape before reading: paths and flags
    (n_rods, n_sites), posteriors (n_rods, n_sites, n_metals), stationary (n_metals,), transmat
    (n_metals, n_metals)), path values in [-1, n_metals), finite posteriors in [0, 1], and
    ``uncertain_below`` in (0, 1].

    Raises
    ------
    InputError
        Missing, truncated or damaged file, or a failed check; the message names the file and
        the dataset or attribute.
    """
    from ..utils.validate import h5_array, h5_attr_json, h5_attr_number, h5_group, open_h5

    p = Path(path)
    if not p.is_file():
        raise InputError(f"{p}: not found (the output folder is incomplete or from an older probeseq)")
    with open_h5(p, "decoded file") as f:
        g = h5_group(f, "decoded", p, "not written by probeseq's decoding")
        metals = h5_attr_json(g, "metals", p)
        if not isinstance(metals, list) or len(metals) < 2 or not all(isinstance(m, str) and m for m in metals):
            raise InputError(f"{p}: attribute 'metals' must be a list of at least two metal symbols, got {metals!r:.60}")
        k = len(metals)
        vit = g.get("viterbi")
        shape = getattr(vit, "shape", None)
        if shape is None or len(shape) != 2:
            h5_array(g, "viterbi", p, "iu", shape=(None, None))  # names what is wrong
        rs = (int(shape[0]), int(shape[1]))
        viterbi = h5_array(g, "viterbi", p, "iu", shape=rs)
        posteriors = h5_array(g, "posteriors", p, "f", shape=rs + (k,))
        mask = h5_array(g, "mask", p, "biu", shape=rs).astype(bool)
        uncertain = h5_array(g, "uncertain", p, "biu", shape=rs).astype(bool)
        stationary = h5_array(g, "stationary", p, "f", shape=(k,))
        transmat = h5_array(g, "transmat", p, "f", shape=(k, k))
        below = h5_attr_number(g, "uncertain_below", p, 0, 1, lo_open=True)
    if viterbi.size and (viterbi.min() < -1 or viterbi.max() >= k):
        raise InputError(f"{p}: dataset 'viterbi' holds metal indices outside -1..{k - 1} ({k} metals)")
    if viterbi.size and (viterbi[mask] < 0).any():
        raise InputError(f"{p}: dataset 'viterbi' marks used sites as masked (-1)")
    for name, arr in (("posteriors", posteriors), ("stationary", stationary), ("transmat", transmat)):
        if not (np.isfinite(arr).all() and (arr.size == 0 or (arr.min() >= 0 and arr.max() <= 1 + 1e-6))):
            raise InputError(f"{p}: dataset '{name}' must hold probabilities in [0, 1] (found NaN, infinite or "
                             "out-of-range values)")
    return DecodedTracks(metals=tuple(metals), viterbi=viterbi, posteriors=posteriors, mask=mask,
                         uncertain=uncertain, stationary=stationary, transmat=transmat, uncertain_below=below)


def _write_replicates(stats, path):
    """Bootstrap replicates of every statistic (for ``compare``'s tests of differences)."""
    import h5py

    with h5py.File(path, "w") as f:
        g = f.create_group("replicates")
        g.attrs["n_boot"] = int(stats.n_boot)
        g.attrs["about"] = "bootstrap over rods: one value per resample, same order in every dataset"
        for name, rep in sorted(stats.replicates.items()):
            if rep is None:
                continue
            d = g.create_dataset(name, data=np.asarray(rep, dtype=float))
            d.attrs["estimate"] = float(stats.estimates.get(name, np.nan))


def read_replicates(outdir) -> dict:
    """Bootstrap replicates written by :func:`write_analysis`: name -> (n_boot,) array.

    A folder without ``bootstrap.h5`` gives an empty dict (no difference tests). Every dataset of
    ``/replicates`` must be a 1-D floating-point array, all of one length (the resamples).

    Raises
    ------
    InputError
        Truncated or damaged file, a missing group, or a dataset of another type or shape.
    """
    from ..utils.validate import h5_array, h5_group, open_h5

    p = Path(outdir) / "bootstrap.h5"
    if not p.is_file():
        return {}
    out = {}
    with open_h5(p, "bootstrap file") as f:
        g = h5_group(f, "replicates", p, "not written by 'probeseq analyze'")
        for name in g:
            out[name] = h5_array(g, name, p, "fiu", shape=(None,)).astype(float, copy=False)
    sizes = {v.size for v in out.values()}
    if len(sizes) > 1:
        raise InputError(f"{p}: the replicate datasets differ in length ({', '.join(map(str, sorted(sizes)))}); "
                         "each must hold one value per resample")
    return out


def load_results(outdir) -> dict:
    """Read and check ``results.json`` of an ``analyze`` output folder.

    Checked: valid JSON holding an object; the schema version; ``classification`` (``label``
    text, ``confidence`` a number in [0, 1]); ``composition`` (metal -> number or null);
    ``statistics`` with ``intervals`` (name -> null or an object whose ``estimate``, ``low``,
    ``high`` are numbers or null); ``provenance`` (``sample`` an object, ``metals`` a list of
    text, ``run_name`` text, where present).

    Returns
    -------
    dict
        The parsed results.

    Raises
    ------
    InputError
        Names the file and the key that is missing or of the wrong type.
    """
    from ..utils.validate import read_json, require

    d = Path(outdir)
    p = d / "results.json"
    if not p.is_file():
        raise InputError(f"{d}: no results.json (not an 'analyze' output folder)")
    res = read_json(p)
    require(res, "schema_version", "integer", str(p), allow_none=True, optional=True)
    v = res.get("schema_version")
    if v != RESULTS_SCHEMA_VERSION or isinstance(v, bool):
        raise InputError(f"{d}: written with results schema version {v}; this probeseq reads version "
                         f"{RESULTS_SCHEMA_VERSION} (re-run 'probeseq analyze')")
    cls = require(res, "classification", dict, str(p))
    where = f"{p} [classification]"
    require(cls, "label", str, where)
    conf = require(cls, "confidence", "number", where)
    if not 0 <= conf <= 1:
        raise InputError(f"{where}: 'confidence' must be a number in [0, 1], got {conf}")
    for key in ("along_rod", "rod_to_rod"):
        require(cls, key, str, where, optional=True)
    comp = require(res, "composition", dict, str(p))
    for m in comp:
        require(comp, m, "number", f"{p} [composition]", allow_none=True)
    st = require(res, "statistics", dict, str(p))
    intervals = require(st, "intervals", dict, f"{p} [statistics]")
    for name in intervals:
        iv = require(intervals, name, dict, f"{p} [statistics.intervals]", allow_none=True)
        for key in () if iv is None else ("estimate", "low", "high"):
            require(iv, key, "number", f"{p} [statistics.intervals.{name}]", optional=True)
    prov = require(res, "provenance", dict, str(p))
    where = f"{p} [provenance]"
    require(prov, "sample", dict, where, optional=True)
    metals = require(prov, "metals", list, where, optional=True)
    if metals is not None and not all(isinstance(m, str) for m in metals):
        raise InputError(f"{where}: 'metals' must be a list of metal symbols, got {metals!r:.60}")
    require(prov, "run_name", str, where, optional=True)
    return res
