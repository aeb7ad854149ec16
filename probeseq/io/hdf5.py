"""Reading HDF5 ion lists: the layout of datasets, units, links refused or followed.
"""

from __future__ import annotations

from contextlib import contextmanager
from pathlib import Path

import numpy as np

from ..exceptions import InputError
from ..utils.tomlfile import clean_text
from .formats import ALL_COLUMNS, _check_unit
from .ions import LEGACY_COLUMNS, REQUIRED_COLUMNS

_LEGACY_OF = {new: old for old, new in LEGACY_COLUMNS.items()}


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
    stored = {c: c for c in ALL_COLUMNS}  # the dataset name in the file (older files: legacy names)
    for c in ALL_COLUMNS:
        try:
            present[c] = g.get(c, getlink=True) is not None
            old = _LEGACY_OF.get(c)
            if not present[c] and old is not None and g.get(old, getlink=True) is not None:
                present[c], stored[c] = True, old
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
        d = _h5_dataset(f, f"/ions/{stored[c]}", p)
        if d.ndim != 1:
            raise InputError(f"{p}: /ions/{stored[c]} must be a 1-D dataset, has shape {d.shape}")
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
