"""Run folders: an ion file plus a small description, so a batch of runs is described once.

A run folder holds the ion file and ``run.toml``::

    [sample]
    name = "batch-150C"               # free text
    synthesis_temperature_c = 150     # any further keys are kept as metadata for `compare`

    [run]
    ions = "ions.h5"                  # path relative to the folder
    metals = ["Co", "Zn"]
    lattice = "lattice.toml"          # a TOML file (relative) or a preset name
    # a = 2.6, repeat = 0.68, sites_per_repeat = 3   (with a preset)
    # ranges = "ranges.toml"          # optional edited range file
    # detection_efficiency = 0.5      # optional, the instrument's known value

Numbers in ``[sample]`` become the metadata fields that ``compare`` can order runs by.

Safety: the files named by ``ions``, ``lattice`` and ``ranges`` must lie inside the run folder
once ``..`` and symbolic links are resolved (``read_run_folder(..., allow_outside=True)`` lifts
this); a lattice that is not a preset name is such a file. ``[sample] name`` is free text kept as
metadata; :attr:`RunDescription.safe_name` (see :func:`safe_file_name`) is the form to build file
names from. ``run.toml`` itself is read by :func:`probeseq.utils.tomlfile.load_toml` (size, encoding and
nesting bounds).
"""

from __future__ import annotations

import math
import re
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path

from ..exceptions import InputError
from ..utils.tomlfile import clean_text, load_toml, short_repr

__all__ = ['RunDescription', 'read_run_folder', 'safe_file_name', 'DESCRIPTION_NAME', 'MAX_NAME_CHARS']

DESCRIPTION_NAME = "run.toml"


#: longest file-name-safe run name, characters
MAX_NAME_CHARS = 80


#: most metals a run may name
MAX_METALS = 16


_UNSAFE_CHARS = re.compile(r'[<>:"|?*\x00-\x1f\x7f]')


_WINDOWS_RESERVED = {"con", "prn", "aux", "nul", *(f"com{i}" for i in range(1, 10)), *(f"lpt{i}" for i in range(1, 10))}


def safe_file_name(text, fallback: str = "run", max_chars: int = MAX_NAME_CHARS) -> str:
    """A readable name that is safe as one file-name component.

    Path separators split the text into parts; empty parts, ``.`` and ``..`` are dropped and the
    rest joined by ``_``; control and format characters are removed, characters that file systems
    refuse (``<>:"|?*``) become ``_``, whitespace runs become one space, leading dots and
    surrounding spaces are stripped, device names (``CON``, ``NUL``...) get a trailing ``_``, and
    the result is cut to ``max_chars`` characters. ``"/../../../victim"`` gives ``"victim"``.

    Parameters
    ----------
    text : object
        The name (converted with ``str``).
    fallback : str
        Used (itself made safe) when nothing is left of ``text``; ``"run"`` when that is empty too.
    max_chars : int
        Longest result, characters.

    Returns
    -------
    str
        A non-empty name without separators, never ``.`` or ``..``, not starting with a dot.
    """
    raw = str(text)[: 16 * max_chars]
    raw = "".join(c for c in raw if unicodedata.category(c)[0] != "C" or c in "\t\n\r")
    parts = [q.strip() for q in re.split(r"[/\\]", unicodedata.normalize("NFC", raw))]
    parts = [q for q in parts if q and q.strip(".")]
    name = "_".join(parts)
    name = _UNSAFE_CHARS.sub("_", name)
    name = " ".join(name.split())
    name = name.lstrip(". ")
    name = name[:max_chars].rstrip(". ")
    if name.split(".")[0].lower() in _WINDOWS_RESERVED:
        name += "_"
    if not name:
        return safe_file_name(fallback, "run", max_chars) if fallback and fallback != text else "run"
    return name


@dataclass(frozen=True)
class RunDescription:
    """What a run folder says about its run.

    Attributes
    ----------
    folder : Path
    ions : Path
        The ion file.
    metals : tuple of str
    lattice : str
        Path of a lattice TOML file, or a preset name.
    lattice_args : dict
        ``a``, ``repeat``, ``sites_per_repeat`` for a preset.
    ranges : Path or None
    detection_efficiency : float or None
        The instrument's known detection efficiency, if given.
    sample : dict
        Everything in ``[sample]`` (name, synthesis temperature, ...).
    """

    folder: Path
    ions: Path
    metals: tuple
    lattice: str
    lattice_args: dict = field(default_factory=dict)
    ranges: Path | None = None
    detection_efficiency: float | None = None
    sample: dict = field(default_factory=dict)

    @property
    def name(self) -> str:
        """The run's name as written in ``[sample] name`` (free text), else the folder name."""
        return str(self.sample.get("name", self.folder.name))

    @property
    def safe_name(self) -> str:
        """:attr:`name` made safe as a file-name component (:func:`safe_file_name`); the folder's
        name when nothing is left of it."""
        return safe_file_name(self.name, fallback=self.folder.resolve().name or "run")


def _path_field(desc: Path, base: Path, key: str, value, allow_outside: bool) -> Path:
    """The file named by ``[run] key``, checked: a string, inside ``base`` (resolved), a regular file."""
    what = {"ions": "ion file", "lattice": "lattice file", "ranges": "range file"}[key]
    if not isinstance(value, str) or not value.strip():
        raise InputError(f"{desc}: [run] {key} must be a file name (text), got {short_repr(value)}")
    if any(unicodedata.category(c)[0] == "C" for c in value) or len(value) > 1024:
        raise InputError(f"{desc}: [run] {key} = {short_repr(value)} is not a usable file name (control "
                         "characters or over 1024 characters)")
    rel = Path(value)
    try:
        if rel.is_absolute() and not allow_outside:
            raise InputError(f"{desc}: [run] {key} = {short_repr(value)} is an absolute path; name a file "
                             "inside the run folder (relative to it)")
        target = (base / rel).resolve()
        if not allow_outside and not target.is_relative_to(base):
            raise InputError(f"{desc}: [run] {key} = {short_repr(value)} points outside the run folder {base}; "
                             "name a file inside the run folder")
        ok = target.is_file()
    except (OSError, RuntimeError, ValueError) as e:
        if isinstance(e, InputError):
            raise
        raise InputError(f"{desc}: [run] {key} = {short_repr(value)} cannot be resolved "
                         f"({clean_text(str(e))})") from None
    if not ok:
        raise InputError(f"{desc}: the {what} {short_repr(value)} named in [run] {key} is not in {base}")
    return desc.parent / rel


def _number(desc: Path, key: str, value, integer: bool = False):
    """A finite positive number (an integer when ``integer``) from ``[run] key``."""
    kinds = (int,) if integer else (int, float)
    bad = isinstance(value, bool) or not isinstance(value, kinds)
    if not bad:
        try:
            bad = not math.isfinite(value) or value <= 0
        except OverflowError:
            bad = True
    if bad:
        kind = "a positive integer" if integer else "a positive finite number"
        raise InputError(f"{desc}: [run] {key} must be {kind}, got {short_repr(value)}")
    return value


def read_run_folder(folder, *, allow_outside: bool = False) -> RunDescription:
    """Read ``run.toml`` of a run folder and check that what it names exists.

    Parameters
    ----------
    folder : str or Path
        The run folder.
    allow_outside : bool
        Accept ``ions``, ``lattice`` and ``ranges`` paths that lead outside the folder (absolute
        paths, ``..``, symbolic links out of it). Off by default, so a shared run folder cannot
        make probeseq read files elsewhere.

    Returns
    -------
    RunDescription
        Paths resolved; every field type-checked.

    Raises
    ------
    InputError
        One line naming ``run.toml`` and the field.
    """
    d = Path(folder)
    if not d.is_dir():
        raise InputError(f"run folder not found: {d}")
    desc = d / DESCRIPTION_NAME
    if not desc.is_file():
        raise InputError(f"{d}: no run description '{DESCRIPTION_NAME}' in the run folder")
    t, _ = load_toml(desc, "run description")
    base = d.resolve()
    run = t.get("run")
    if not isinstance(run, dict):
        raise InputError(f"{desc}: missing table [run]")
    sample = t.get("sample", {})
    if not isinstance(sample, dict):
        raise InputError(f"{desc}: [sample] must be a table")
    for key in ("ions", "metals", "lattice"):
        if key not in run:
            raise InputError(f"{desc}: missing field '{key}' in table [run]")
    metals = run["metals"]
    if isinstance(metals, str):
        metals = [m.strip() for m in metals.split(",")]
    if not isinstance(metals, list) or not 1 <= len(metals) <= MAX_METALS or not all(
            isinstance(m, str) and re.fullmatch(r"[A-Z][a-z]{0,2}", m) for m in metals):
        raise InputError(f"{desc}: [run] metals must be a list of 1 to {MAX_METALS} element symbols such as "
                         f"[\"Co\", \"Zn\"], got {short_repr(metals)}")
    ions = _path_field(desc, base, "ions", run["ions"], allow_outside)
    lattice = run["lattice"]
    if not isinstance(lattice, str) or not lattice.strip():
        raise InputError(f"{desc}: [run] lattice must be a preset name or a TOML file name, got {short_repr(lattice)}")
    from ..lattice.model import PRESETS

    if lattice.lower() not in PRESETS:
        lattice = str(_path_field(desc, base, "lattice", lattice, allow_outside))
    largs = {}
    for k in ("a", "repeat", "sites_per_repeat"):
        if k in run:
            largs[k] = _number(desc, k, run[k], integer=(k == "sites_per_repeat"))
    ranges = None
    if "ranges" in run:
        ranges = _path_field(desc, base, "ranges", run["ranges"], allow_outside)
    eta = run.get("detection_efficiency")
    if eta is not None and (isinstance(eta, bool) or not isinstance(eta, (int, float)) or not 0 < eta <= 1):
        raise InputError(f"{desc}: [run] detection_efficiency must be a number in (0, 1], got {short_repr(eta)}")
    return RunDescription(folder=d, ions=ions, metals=tuple(metals), lattice=lattice, lattice_args=largs,
                          ranges=ranges, detection_efficiency=None if eta is None else float(eta),
                          sample=dict(sample))
