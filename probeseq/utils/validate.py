"""Shared checks of parameters and of what probeseq reads back from its own files.

Every check raises :class:`~probeseq.exceptions.InputError` with a one-line message that names
the value (a command-line option or parameter, or a file and the key, attribute or dataset in it),
what was expected and what came. The checks are written once here and called at the library
entry points, so the command line and the library give the same message.

Reading helpers: :func:`read_json` (a JSON file, bounded in size), :func:`open_h5` (an HDF5 file,
with damage reported as an input error), :func:`h5_group`, :func:`h5_array` (a dataset checked for
type and shape *before* it is read, and for the memory it needs), :func:`h5_attr_number` and
:func:`h5_attr_json`. Value helpers: :func:`require` (a key of a JSON object, of a given type),
:func:`check_number`, :func:`check_seed`, :func:`check_scale` and :func:`check_memory`.
"""

from __future__ import annotations

import json
import math
import os
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from ..exceptions import InputError
from .tomlfile import short_repr

__all__ = ['is_number', 'require', 'check_number', 'check_seed', 'check_scale', 'check_memory', 'available_memory_bytes', 'format_bytes', 'read_json', 'open_h5', 'h5_group', 'h5_array', 'h5_attr_number', 'h5_attr_json', 'SEED_LIMIT', 'SCALE_RANGE', 'MEMORY_SHARE', 'MAX_JSON_BYTES']

#: seeds are integers in [0, SEED_LIMIT) (numpy's generators take no negative seed)
SEED_LIMIT = 2 ** 63


#: accepted fixed lateral scale (reconstruction length / crystal length); 1 = lengths are right
SCALE_RANGE = (0.2, 5.0)


#: share of the available memory a single step may plan to use
MEMORY_SHARE = 0.8


#: largest JSON file read back (results.json is about 0.1 MB)
MAX_JSON_BYTES = 256 * 2 ** 20


_KIND_TEXT = {dict: "an object {key: value}", list: "a list", str: "text", bool: "true or false",
              "number": "a number", "integer": "an integer"}


def is_number(value) -> bool:
    """Whether ``value`` is a real number (int or float, numpy included, not a bool)."""
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_))


def _is_integer(value) -> bool:
    return isinstance(value, (int, np.integer)) and not isinstance(value, (bool, np.bool_))


def _kind_of(value) -> str:
    """A short description of what a value is, for messages ('text 'high'', 'a list', ...)."""
    if value is None:
        return "null"
    if isinstance(value, str):
        return f"text {short_repr(value)}"
    if isinstance(value, dict):
        return "an object"
    if isinstance(value, list):
        return "a list"
    return short_repr(value)


def _fits(value, kind) -> bool:
    if kind == "number":
        return is_number(value)
    if kind == "integer":
        return _is_integer(value)
    if kind is bool:
        return isinstance(value, (bool, np.bool_))
    return isinstance(value, kind)


def require(d, key: str, kind, where: str, *, allow_none: bool = False, optional: bool = False):
    """The value of ``d[key]``, checked to be of ``kind``.

    Parameters
    ----------
    d : object
        Should be a dict (a JSON object).
    key : str
    kind : {dict, list, str, bool, "number", "integer"}
        Expected type; ``"number"`` is any finite or non-finite real number but not a bool.
    where : str
        The file and the place in it, for the message (e.g. ``"run/results.json [classification]"``).
    allow_none : bool
        Accept ``null``.
    optional : bool
        A missing key gives ``None`` instead of an error.

    Raises
    ------
    InputError
        ``d`` is not an object, the key is missing, or its value is of another type.
    """
    if not isinstance(d, dict):
        raise InputError(f"{where}: expected {_KIND_TEXT[dict]}, got {_kind_of(d)}")
    if key not in d:
        if optional:
            return None
        raise InputError(f"{where}: key '{key}' is missing (the file is damaged or not written by probeseq)")
    v = d[key]
    if v is None and (allow_none or optional):
        return None
    if not _fits(v, kind):
        raise InputError(f"{where}: '{key}' must be {_KIND_TEXT[kind]}, got {_kind_of(v)}")
    return v


def _interval_text(lo, hi, lo_open, hi_open) -> str:
    if lo is not None and hi is not None:
        return f"{'(' if lo_open else '['}{lo:g}, {hi:g}{')' if hi_open else ']'}"
    if lo is not None:
        return f"{'>' if lo_open else '>='} {lo:g}"
    return f"{'<' if hi_open else '<='} {hi:g}"


def check_number(value, name: str, lo=None, hi=None, *, lo_open: bool = False, hi_open: bool = False,
                 integer: bool = False, allow_none: bool = False, finite: bool = True):
    """``value`` as a float (or int), checked to be a number in the given range.

    Parameters
    ----------
    value : object
    name : str
        What the value is, for the message (an option such as ``--alpha``, or ``file: key``).
    lo, hi : float, optional
        Bounds; ``lo_open`` / ``hi_open`` exclude them.
    integer : bool
        Require an integer (a whole float is not accepted).
    allow_none : bool
        Pass ``None`` through.
    finite : bool
        Refuse NaN and infinities (default).

    Raises
    ------
    InputError
    """
    if value is None and allow_none:
        return None
    rng = "" if lo is None and hi is None else (" in " if lo is not None and hi is not None else " ") + \
        _interval_text(lo, hi, lo_open, hi_open)
    if integer and not _is_integer(value):
        raise InputError(f"{name} must be an integer{rng}, got {_kind_of(value)}")
    if not is_number(value):
        raise InputError(f"{name} must be a number{rng}, got {_kind_of(value)}")
    v = int(value) if integer else float(value)
    if finite and not integer and not math.isfinite(v):
        raise InputError(f"{name} must be a finite number{rng}, got {v}")
    if (lo is not None and (v < lo or (lo_open and v == lo))) or (hi is not None and (v > hi or (hi_open and v == hi))):
        raise InputError(f"{name} must be{' an integer' if integer else ''}{rng}, got {short_repr(v)}")
    return v


def check_seed(value, name: str = "--seed"):
    """A random seed: ``None``, a numpy Generator / BitGenerator / SeedSequence, or an integer in
    [0, 2**63). Returned unchanged.

    Raises
    ------
    InputError
        Negative, too large, or not an integer.
    """
    if value is None or isinstance(value, (np.random.Generator, np.random.BitGenerator, np.random.SeedSequence)):
        return value
    if not _is_integer(value) or not 0 <= int(value) < SEED_LIMIT:
        raise InputError(f"{name} must be an integer from 0 to 2**63 - 1, got {_kind_of(value)}")
    return value


def check_scale(value, name: str = "--scale"):
    """A fixed lateral scale (reconstruction / crystal length): ``None`` or a number in
    :data:`SCALE_RANGE`.

    Raises
    ------
    InputError
    """
    if value is None:
        return None
    v = check_number(value, name)
    if not v > 0:
        raise InputError(f"{name} must be positive, got {short_repr(value)}")
    lo, hi = SCALE_RANGE
    if not lo <= v <= hi:
        raise InputError(f"{name} = {v:g} is outside the accepted {lo:g}-{hi:g} (the lateral scale, reconstruction "
                         "length / crystal length, is near 1 for any usable reconstruction)")
    return v


# ---------------------------------------------------------------------- memory
def available_memory_bytes() -> int | None:
    """Memory available to a new allocation without swapping, bytes (None when unknown).

    Read from ``MemAvailable`` of ``/proc/meminfo`` where it exists, else from the count of free
    physical pages.
    """
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (AttributeError, ValueError, OSError):
        return None


def format_bytes(n: float) -> str:
    """``n`` bytes as text with a binary unit (e.g. ``'3.2 GiB'``)."""
    n = float(n)
    for unit in ("B", "KiB", "MiB", "GiB", "TiB", "PiB"):
        if abs(n) < 1024 or unit == "PiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n:.1f} PiB"  # pragma: no cover - the loop always returns


def check_memory(nbytes: float, what: str, remedy: str) -> None:
    """Refuse a step whose estimated memory exceeds :data:`MEMORY_SHARE` of the available memory.

    Parameters
    ----------
    nbytes : float, bytes
        Estimated peak memory of the step.
    what : str
        The step, for the message.
    remedy : str
        What the user can change (options to reduce), for the message.

    Raises
    ------
    InputError
    """
    avail = available_memory_bytes()
    if avail is not None and nbytes > MEMORY_SHARE * avail:
        raise InputError(f"{what} needs about {format_bytes(nbytes)} of memory, more than the "
                         f"{format_bytes(avail)} available; {remedy}")


# ---------------------------------------------------------------------- JSON
def parse_json(text: str, what: str):
    """``json.loads`` whose failures are one-line :class:`InputError` s starting with ``what``."""
    try:
        return json.loads(text)
    except RecursionError:
        raise InputError(f"{what} not valid JSON (nested too deeply)") from None
    except ValueError as e:
        raise InputError(f"{what} not valid JSON ({_first_line(e)})") from None


def read_json(path, max_bytes: int = MAX_JSON_BYTES):
    """Parse a JSON file; every failure is an :class:`InputError` naming the file.

    Raises
    ------
    InputError
        The file is missing, unreadable, too large, not UTF-8 or not valid JSON.
    """
    p = Path(path)
    try:
        size = p.stat().st_size
        if size > max_bytes:
            raise InputError(f"{p}: {format_bytes(size)}, larger than any file of this kind probeseq writes "
                             f"({format_bytes(max_bytes)} at most)")
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError(f"{p}: not found") from None
    except UnicodeDecodeError:
        raise InputError(f"{p}: not UTF-8 text (the file is damaged)") from None
    except OSError as e:
        raise InputError(f"{p}: cannot be read ({e.strerror or e})") from None
    return parse_json(text, f"{p}:")


# ---------------------------------------------------------------------- HDF5
@contextmanager
def open_h5(path, what: str = "HDF5 file"):
    """Open an HDF5 file for reading; damage found while reading it becomes an :class:`InputError`.

    Parameters
    ----------
    path : path
    what : str
        What the file should be, for the messages (e.g. ``"columns file"``).
    """
    import h5py

    p = Path(path)
    if not p.is_file():
        raise InputError(f"{what} not found: {p}")
    try:
        f = h5py.File(p, "r")
    except (OSError, ValueError) as e:
        raise InputError(f"{p}: not a readable HDF5 file, truncated or damaged ({_first_line(e)})") from None
    try:
        with f:
            yield f
    except InputError:
        raise
    except (OSError, KeyError, RuntimeError, TypeError, ValueError) as e:
        raise InputError(f"{p}: damaged HDF5 file ({type(e).__name__}: {_first_line(e)})") from None


def _first_line(e) -> str:
    text = " ".join(str(e).split())
    return text[:200] if text else type(e).__name__


def h5_group(f, name: str, where, hint: str):
    """The group ``name`` of an open HDF5 file, or an :class:`InputError` with ``hint``."""
    import h5py

    if name not in f or not isinstance(f[name], h5py.Group):
        raise InputError(f"{where}: no group '/{name}' ({hint})")
    return f[name]


_DTYPE_TEXT = {"b": "true/false", "i": "integer", "u": "integer", "f": "floating-point"}


def h5_array(g, name: str, where, kinds: str = "fiu", shape=None, *, optional: bool = False):
    """Read dataset ``name`` of group ``g`` after checking its type and shape.

    Parameters
    ----------
    g : h5py.Group
    name : str
    where : str or path
        The file, for the message.
    kinds : str
        Accepted numpy dtype kinds (``"f"`` float, ``"i"``/``"u"`` integer, ``"b"`` bool).
    shape : tuple of (int or None), optional
        Expected shape; ``None`` entries accept any length.
    optional : bool
        A missing dataset gives ``None``.

    Raises
    ------
    InputError
        Missing, not a dataset, wrong type or shape, or more than the available memory.
    """
    import h5py

    if name not in g:
        if optional:
            return None
        raise InputError(f"{where}: dataset '{name}' is missing")
    ds = g[name]
    if not isinstance(ds, h5py.Dataset):
        raise InputError(f"{where}: '{name}' is not a dataset")
    if ds.dtype.kind not in kinds:
        want = " or ".join(dict.fromkeys(_DTYPE_TEXT[k] for k in kinds))
        raise InputError(f"{where}: dataset '{name}' holds {ds.dtype} values, expected {want} numbers")
    got = ds.shape
    if got is None:
        raise InputError(f"{where}: dataset '{name}' is empty (no dataspace)")
    if shape is not None and (len(got) != len(shape) or any(s is not None and s != n for s, n in zip(shape, got))):
        want = "(" + ", ".join("any" if s is None else str(s) for s in shape) + (",)" if len(shape) == 1 else ")")
        raise InputError(f"{where}: dataset '{name}' has shape {got}, expected {want}")
    check_memory(float(np.prod(got, dtype=float)) * ds.dtype.itemsize, f"reading dataset '{name}' of {where}",
                 "the file is larger than this machine can hold, or damaged")
    return ds[...]


def h5_attr_number(g, key: str, where, lo=None, hi=None, *, lo_open: bool = False, hi_open: bool = False,
                   integer: bool = False, default=None):
    """A numeric attribute of an HDF5 object, checked like :func:`check_number`.

    A missing attribute gives ``default`` when one is given, else an :class:`InputError`.
    """
    if key not in g.attrs:
        if default is not None:
            return default
        raise InputError(f"{where}: attribute '{key}' is missing")
    v = g.attrs[key]
    if isinstance(v, np.ndarray) and v.shape in ((), (1,)):
        v = v.reshape(-1)[0]
    if integer and isinstance(v, (float, np.floating)) and float(v).is_integer():
        v = int(v)
    return check_number(v, f"{where}: attribute '{key}'", lo, hi, lo_open=lo_open, hi_open=hi_open,
                        integer=integer)


def h5_attr_json(g, key: str, where):
    """A JSON-text attribute of an HDF5 object, parsed."""
    if key not in g.attrs:
        raise InputError(f"{where}: attribute '{key}' is missing")
    v = g.attrs[key]
    if isinstance(v, bytes):
        try:
            v = v.decode("utf-8")
        except UnicodeDecodeError:
            raise InputError(f"{where}: attribute '{key}' is not UTF-8 text") from None
    if not isinstance(v, str):
        raise InputError(f"{where}: attribute '{key}' must be JSON text, got {_kind_of(v)}")
    return parse_json(v, f"{where}: attribute '{key}' is")
