"""Exports of an ``analyze`` output folder: tables, JSON, a self-describing HDF5 file, figures.

``export_outdir(outdir, fmt, rods=..., depth_nm=(a, b))`` selects rods and a depth window and
writes one file. The HDF5 export holds the counts, posteriors, Viterbi paths, rod positions, site
depths and all fitted parameters, every dataset with a ``unit`` attribute and a ``description``,
so it can be read with h5py alone.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..exceptions import InputError
from ..utils.tomlfile import short_repr

__all__ = ['FORMATS', 'OutputFolder', 'load_outdir', 'select_sites', 'export_outdir', 'parse_rods', 'parse_depth']

FORMATS = ("csv", "json", "hdf5", "svg", "pdf", "png")


@dataclass(frozen=True)
class OutputFolder:
    """An analysis output folder read back: results, columns and decoded tracks."""

    path: Path
    results: dict
    columns: object
    decoded: object


def load_outdir(outdir) -> OutputFolder:
    """Read an ``analyze`` output folder, checking what it reads.

    ``results.json`` is checked by :func:`probeseq.outputs.results.load_results`, ``columns.h5`` by
    :func:`probeseq.lattice.rodcolumns.load_columns`, ``decoded.h5`` by :func:`probeseq.outputs.results.load_decoded`;
    then the decoding is checked against the columns (same metals, same rods and sites, a metal
    decoded at every used site).

    Raises
    ------
    InputError
        Names the file and what in it is wrong.
    """
    from ..lattice.rodcolumns import load_columns
    from .results import load_decoded, load_results

    d = Path(outdir)
    if not d.is_dir():
        raise InputError(f"analysis folder not found: {d}")
    res = load_results(d)
    cols = load_columns(d / "columns.h5")
    dec = load_decoded(d / "decoded.h5")
    _check_decoded_matches(cols, dec, d)
    return OutputFolder(d, res, cols, dec)


def _check_decoded_matches(cols, dec, d: Path) -> None:
    """decoded.h5 must describe the sites of columns.h5: same metals, shape and used sites."""
    if tuple(dec.metals) != tuple(cols.metals):
        raise InputError(f"{d}: decoded.h5 names metals {list(dec.metals)} but columns.h5 {list(cols.metals)}; "
                         "the folder mixes files of different analyses")
    if dec.viterbi.shape != cols.mask.shape:
        raise InputError(f"{d}: decoded.h5 holds {dec.viterbi.shape[0]} rods x {dec.viterbi.shape[1]} sites but "
                         f"columns.h5 {cols.n_rods} x {cols.n_sites}; the folder mixes files of different analyses")
    if (dec.viterbi[cols.mask] < 0).any():
        raise InputError(f"{d}: decoded.h5 has no metal at sites that columns.h5 uses; the folder mixes files of "
                         "different analyses")


def parse_rods(text, n_rods: int):
    """'3,5,10-12' -> sorted unique rod ids; errors name the ids that exist."""
    if text is None or str(text).strip() == "":
        return None
    ids = []
    for part in str(text).split(","):
        part = part.strip()
        try:
            if "-" in part[1:]:
                a, b = part.split("-", 1)
                ids.extend(range(int(a), int(b) + 1))
            else:
                ids.append(int(part))
        except ValueError:
            raise InputError(f"--rods: '{part}' is not a rod id or a range like 10-12") from None
    ids = sorted(set(ids))
    bad = [i for i in ids if not 0 <= i < n_rods]
    if bad:
        raise InputError(f"--rods: unknown rod id(s) {', '.join(map(str, bad[:10]))}; rods 0-{n_rods - 1} exist")
    return np.array(ids, dtype=int)


def parse_depth(text):
    """'A:B' in nm -> (A, B); either side may be empty."""
    if text is None or str(text).strip() == "":
        return None
    s = str(text)
    if ":" not in s:
        raise InputError(f"--depth-window: '{s}' is not a window 'A:B' in nm")
    a, b = s.split(":", 1)
    try:
        lo = float(a) if a.strip() else -np.inf
        hi = float(b) if b.strip() else np.inf
    except ValueError:
        raise InputError(f"--depth-window: '{s}' is not a window 'A:B' of numbers in nm") from None
    if not lo < hi:
        raise InputError(f"--depth-window: empty window {s} (A must be below B)")
    return lo, hi


def select_sites(columns, rods=None, depth_nm=None):
    """Boolean (n_rods, n_sites) selection of used sites in the chosen rods and depth window."""
    sel = columns.mask.copy()
    if rods is not None:
        keep = np.zeros(columns.n_rods, dtype=bool)
        keep[rods] = True
        sel &= keep[:, None]
    if depth_nm is not None:
        z = columns.site_depths_nm()
        sel &= (z >= depth_nm[0]) & (z <= depth_nm[1])
    if not sel.any():
        z = columns.site_depths_nm()[columns.mask]
        where = f"{z.min():.2f}-{z.max():.2f} nm" if z.size else "none"
        raise InputError(f"the selection holds no decoded site (used sites span depths {where}, "
                         f"rods 0-{columns.n_rods - 1})")
    return sel


def _tracks(of: OutputFolder, sel):
    """The tracks.csv columns for the selected sites, plus every metal's posterior and counts."""
    from .results import tracks_table

    col, dec = of.columns, of.decoded
    out = tracks_table(col, dec, select=sel)
    r, s = out["rod"], out["site"]
    for k, m in enumerate(col.metals):
        out[f"p_{m}"] = dec.posteriors[r, s, k]
        out[f"counts_{m}"] = col.counts[r, s, k]
    return out


def export_outdir(outdir, fmt: str, out=None, rods=None, depth_nm=None, size: str = "two-column",
                  dpi: int = 300, force: bool = False) -> Path:
    """Write one export of an analysis folder and return its path.

    Parameters
    ----------
    fmt : {"csv", "json", "hdf5", "svg", "pdf", "png"}
    out : path, optional
        Default ``OUTDIR/exports/tracks.<ext>``.
    rods : array of int, or str, optional
        Rod ids, or their text as on the command line (``"3,5,10-12"``, see :func:`parse_rods`).
    depth_nm : (float, float), optional
        Depth window, nm.
    force : bool
        Replace an existing file that probeseq wrote; the analysis folder's own files are never
        replaced (see :mod:`probeseq.outputs`).
    """
    from ..utils.marks import MARK
    from .folder import check_outfile, staged_file, write_json

    fmt = str(fmt).lower()
    if fmt not in FORMATS:
        raise InputError(f"--format '{fmt}' is not supported; choose one of {', '.join(FORMATS)}")
    from .figures import SIZE_PRESETS_MM, _check_dpi

    if isinstance(size, str) and size not in SIZE_PRESETS_MM:  # (width_mm, height_mm) is checked when drawn
        raise InputError(f"--size {short_repr(size)} is not a figure width preset; choose one of "
                         f"{', '.join(SIZE_PRESETS_MM)}")
    _check_dpi(dpi)
    ext = {"hdf5": "h5"}.get(fmt, fmt)
    path = Path(out) if out is not None else Path(outdir) / "exports" / f"tracks.{ext}"
    if path.suffix.lower() != f".{ext}":
        raise InputError(f"--out {path}: a {fmt} export needs a name ending in .{ext}")
    check_outfile(path, force, [outdir])
    of = load_outdir(outdir)
    if isinstance(rods, str):
        rods = parse_rods(rods, of.columns.n_rods)
    sel = select_sites(of.columns, rods, depth_nm)
    with staged_file(path, force, [outdir]) as part:
        if fmt == "csv":
            from .results import _write_table

            t = _tracks(of, sel)
            fm = {k: "%.4f" for k in t if k not in ("rod", "site", "state")}
            _write_table(part, t, tuple(t), fm, comment=f"{MARK}: decoded tracks of {of.path.name}")
        elif fmt == "json":
            t = _tracks(of, sel)
            write_json(part, {"schema_version": of.results["schema_version"],
                              "classification": of.results["classification"],
                              "composition": of.results["composition"],
                              "units": {"rod_x_nm": "nm", "rod_y_nm": "nm", "z_nm": "nm",
                                        "posterior": "probability"},
                              "sites": {k: np.asarray(v).tolist() for k, v in t.items()}}, mark=True)
        elif fmt == "hdf5":
            _write_hdf5(of, sel, part)
        else:
            from .tracks import plot_tracks

            r = np.flatnonzero(sel.any(1))
            z = of.columns.site_depths_nm()[sel]
            plot_tracks(of.columns, of.decoded, part, rods=r,
                        depth_nm=(float(z.min()), float(z.max())), size=size, dpi=dpi)
    return path


def _write_hdf5(of: OutputFolder, sel, path):
    import h5py

    from ..utils.marks import MARK, to_jsonable

    col, dec = of.columns, of.decoded
    rods = np.flatnonzero(sel.any(1))
    sites = np.flatnonzero(sel.any(0))
    s0, s1 = sites.min(), sites.max() + 1
    sub = (rods[:, None], np.arange(s0, s1)[None, :])
    with h5py.File(path, "w") as f:
        f.attrs["about"] = ("probeseq export: decoded metal sequences along rods. Datasets carry 'unit' and "
                            "'description' attributes; index order is (rod, site[, metal]).")
        f.attrs["metals"] = json.dumps(list(col.metals))
        f.attrs["schema_version"] = int(of.results["schema_version"])
        f.attrs["written_by"] = MARK

        def put(name, data, unit, desc):
            d = f.create_dataset(name, data=data, **({"compression": "gzip", "compression_opts": 1} if np.size(data) > 4096 else {}))
            d.attrs["unit"] = unit
            d.attrs["description"] = desc

        put("counts", col.counts[sub], "metal atoms per site", "metal counts per rod, site and metal channel")
        put("posteriors", dec.posteriors[sub].astype(np.float32), "probability",
            "posterior probability of each metal at each site")
        put("viterbi", dec.viterbi[sub].astype(np.int8), "metal index", "most probable metal sequence; -1 = not used")
        put("mask", (sel[sub]).astype(np.uint8), "1 = selected and used", "sites inside the analysed volume and selection")
        put("rod_id", rods, "1", "rod ids as in tracks.csv")
        put("rod_xy_nm", col.rod_xy_nm[rods], "nm", "rod axis position at depth z_ref_nm, reconstruction frame")
        put("site_index", np.arange(s0, s1), "1", "site index along the rods")
        put("site_z_nm", col.site_depths_nm()[sub], "nm", "depth of each site at its rod's axis")
        put("tilt", col.tilt, "dx/dz, dy/dz", "rod axis direction")
        put("transmat", np.asarray(dec.transmat), "probability", "fitted transition matrix (row: from, column: to)")
        put("stationary", np.asarray(dec.stationary), "probability", "stationary composition of the fitted chain")
        f.attrs["z_ref_nm"] = col.z_ref_nm
        f.attrs["pitch_nm"] = col.pitch_nm
        g = f.create_group("parameters")
        g.attrs["about"] = "all fitted parameters and settings, as JSON text"
        for key in ("classification", "composition", "statistics", "decoding", "columns", "ranging", "provenance"):
            g.attrs[key] = json.dumps(to_jsonable(of.results.get(key)), sort_keys=True)
