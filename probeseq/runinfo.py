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
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from .exceptions import InputError

__all__ = ["RunDescription", "read_run_folder", "DESCRIPTION_NAME"]

DESCRIPTION_NAME = "run.toml"


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
        return str(self.sample.get("name", self.folder.name))


def read_run_folder(folder) -> RunDescription:
    """Read ``run.toml`` of a run folder and check that what it names exists."""
    d = Path(folder)
    if not d.is_dir():
        raise InputError(f"run folder not found: {d}")
    desc = d / DESCRIPTION_NAME
    if not desc.is_file():
        raise InputError(f"{d}: no run description '{DESCRIPTION_NAME}' in the run folder")
    try:
        t = tomllib.loads(desc.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as e:
        raise InputError(f"{desc}: malformed TOML ({e})") from None
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
    if not isinstance(metals, list) or not all(isinstance(m, str) and m for m in metals):
        raise InputError(f"{desc}: [run] metals must be a list of element symbols, got {metals!r}")
    ions = d / str(run["ions"])
    if not ions.is_file():
        raise InputError(f"{desc}: the ion file '{run['ions']}' named in [run] ions is not in {d}")
    lattice = str(run["lattice"])
    if lattice.lower().endswith(".toml"):
        lp = d / lattice
        if not lp.is_file():
            raise InputError(f"{desc}: the lattice file '{lattice}' named in [run] lattice is not in {d}")
        lattice = str(lp)
    largs = {k: run[k] for k in ("a", "repeat", "sites_per_repeat") if k in run}
    ranges = None
    if "ranges" in run:
        ranges = d / str(run["ranges"])
        if not ranges.is_file():
            raise InputError(f"{desc}: the range file '{run['ranges']}' named in [run] ranges is not in {d}")
    eta = run.get("detection_efficiency")
    if eta is not None and (isinstance(eta, bool) or not isinstance(eta, (int, float)) or not 0 < eta <= 1):
        raise InputError(f"{desc}: [run] detection_efficiency must be a number in (0, 1], got {eta!r}")
    return RunDescription(folder=d, ions=ions, metals=tuple(metals), lattice=lattice, lattice_args=largs,
                          ranges=ranges, detection_efficiency=None if eta is None else float(eta),
                          sample=dict(sample))
