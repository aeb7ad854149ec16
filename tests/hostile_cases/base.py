"""The small valid data every hostile case starts from, made once per session.

``make_base(folder, runner)`` writes, with probeseq's own command line:

* ``run/`` — a run folder (``ions.h5``, ``run.toml``, ``lattice.toml``) of a small simulated
  long-block run (about 17 000 ions, enough metal ions to register the lattice, analysed in seconds);
* ``small.npz`` — 400 ions of that run (x, y, z, mass_to_charge): too few to register a lattice,
  so a malformed-but-readable ion file stops early instead of running the whole pipeline;
* ``ranges.toml`` — the range file ``probeseq range`` writes for the run;
* ``columns/`` — a ``probeseq columns`` output folder of the run;
* ``analysis/`` — an ``analyze`` output folder of the run (few bootstrap resamples).
"""

from __future__ import annotations

import shutil
from pathlib import Path

BASE_VERSION = "1"
RUN_TOML = """# run description of a small simulated run
[sample]
name = "hostile-base"
synthesis_temperature_c = 150

[run]
ions = "ions.h5"
metals = ["Co", "Zn"]
lattice = "lattice.toml"
detection_efficiency = 0.5
"""


def _check(runner, argv, cwd, folder):
    out, err = folder / "base.stdout", folder / "base.stderr"
    code, how, _ = runner.run(argv, cwd, out, err)
    msg = err.read_text(errors="replace") if err.exists() else ""
    for f in (out, err):
        if f.exists():
            f.unlink()
    if how != "ok" or code != 0:
        raise RuntimeError(f"making the base data failed: probeseq {' '.join(argv)} -> {how}, exit {code}: "
                           f"{msg.strip()[-400:]}")


def make_base(folder, runner) -> Path:
    """Write the base data into ``folder`` (reused when already complete); returns the folder."""
    import h5py
    import numpy as np

    folder = Path(folder)
    stamp = folder / "BASE_COMPLETE"
    if stamp.is_file() and stamp.read_text() == BASE_VERSION:
        return folder
    if folder.exists():
        shutil.rmtree(folder)
    folder.mkdir(parents=True)
    run = folder / "run"
    run.mkdir()
    _check(runner, ["simulate", str(run / "ions.h5"), "--pattern", "long-block", "--tip-radius", "5",
                    "--depth", "14", "--seed", "7", "-q"], folder, folder)
    (run / "ions.lattice.toml").rename(run / "lattice.toml")
    (run / "ions.truth.json").unlink()
    (run / "run.toml").write_text(RUN_TOML, encoding="utf-8")

    with h5py.File(run / "ions.h5", "r") as f:
        g = f["ions"]
        cols = {k: g[k][...] for k in ("x", "y", "z", "mass_to_charge")}
    rng = np.random.default_rng(20240601)
    idx = np.sort(rng.choice(len(cols["x"]), size=400, replace=False))
    np.savez(folder / "small.npz", **{k: v[idx] for k, v in cols.items()})

    _check(runner, ["range", str(run / "ions.h5"), "--metals", "Co,Zn", "--out", str(folder / "ranges.toml"),
                    "-q"], folder, folder)
    _check(runner, ["columns", str(run / "ions.h5"), "--metals", "Co,Zn", "--lattice", str(run / "lattice.toml"),
                    "--out", str(folder / "columns"), "-q"], folder, folder)
    _check(runner, ["analyze", str(run), "--out", str(folder / "analysis"), "--n-boot", "20", "--n-starts", "1",
                    "-q"], folder, folder)
    stamp.write_text(BASE_VERSION)
    return folder
