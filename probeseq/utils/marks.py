"""How probeseq marks what it wrote, and turns numbers into JSON-safe values.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .._version import __version__

__all__ = ['MARK', 'figure_metadata', 'to_jsonable', 'h5_compression']

#: the text every single output file carries (a comment, an attribute or metadata), so that
#: ``--force`` can tell probeseq's files from the user's
MARK = f"written by probeseq {__version__}"


MARK_BYTES = b"written by probeseq"


def figure_metadata(path) -> dict:
    """Matplotlib ``savefig`` metadata that carries probeseq's mark for the format of ``path``."""
    suffix = Path(path).suffix.lower()
    if suffix == ".png":
        return {"Software": MARK}
    if suffix == ".svg":
        return {"Creator": MARK, "Date": None}
    if suffix == ".pdf":
        return {"Creator": MARK, "CreationDate": None}
    return {}


#: PNG encoder settings of every figure file: zlib level 1 encodes about 4x faster than PIL's default
#: level 6 for files about 13 % larger (measured on the run-lengths figure at 300 dpi).
PNG_PIL_KWARGS = {"compress_level": 1}

#: HDF5 datasets of more elements than this are written uncompressed: gzip even at level 1 took
#: 14 s for the posteriors of a 10^8-ion run (530 MB, to 290 MB) and 7 s for its counts, while
#: writing them as they are takes about a second (files about 1.8 x larger)
H5_GZIP_MAX_ELEMENTS = 2 ** 22


def h5_compression(n_elements: int) -> dict:
    """``create_dataset`` keywords for a dataset of ``n_elements``: gzip level 1 from 4097 elements up
    to :data:`H5_GZIP_MAX_ELEMENTS`, none otherwise (small ones gain nothing, large ones cost time)."""
    return {"compression": "gzip", "compression_opts": 1} if 4096 < n_elements <= H5_GZIP_MAX_ELEMENTS else {}


def figure_save_kwargs(path) -> dict:
    """``savefig`` keyword arguments for ``path``: probeseq's mark, and the fast PNG encoder for PNG."""
    kw = {"metadata": figure_metadata(path)}
    if Path(path).suffix.lower() == ".png":
        kw["pil_kwargs"] = dict(PNG_PIL_KWARGS)
    return kw


# ---------------------------------------------------------------------- JSON
def finite_or_none(value):
    """A number as a Python float, or None when it is NaN or infinite (JSON has no NaN).

    The one NaN-to-None rule of probeseq's JSON outputs; :func:`to_jsonable` applies it to every
    float it meets.

    Parameters
    ----------
    value : float, int or numpy scalar
        Any number, in whatever unit it carries (the unit is unchanged).

    Returns
    -------
    float or None
    """
    v = float(value)
    return v if np.isfinite(v) else None


def to_jsonable(obj):
    """Convert numpy scalars/arrays, paths and tuples, recursively, to plain JSON types.

    Non-finite floats become ``None`` (JSON has no NaN, see :func:`finite_or_none`); integers and
    booleans stay integers and booleans, other objects are returned unchanged.

    Parameters
    ----------
    obj : object
        Nested dicts, lists and tuples of numbers, numpy scalars or arrays, paths and text.

    Returns
    -------
    object
        The same structure made of dict, list, str, int, float, bool and None.
    """
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating, float)):
        return finite_or_none(obj)
    if isinstance(obj, Path):
        return str(obj)
    return obj
