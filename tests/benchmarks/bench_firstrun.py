"""Benchmark: the first analysis after a fresh install, with `probeseq prepare` first (issue 22).

Run from the repository:  python tests/benchmarks/bench_firstrun.py [--from-worktree] [--jobs N] [--quick]

Makes a fresh copy of the repository in a temporary folder: HEAD's tracked files (``git archive
HEAD``), or with ``--from-worktree`` the working tree's files that git tracks or would track
(``git ls-files --cached --others --exclude-standard``: uncommitted work included, ignored files
such as ``__pycache__`` left out). The copy holds no compiled-kernel cache. Every command then
runs in a fresh process with ``PYTHONPATH`` on the copy (each child checks that it imports
probeseq from the copy, not an installed one) and ``NUMBA_CACHE_DIR`` unset, and is timed (wall):

(a) ``probeseq prepare`` (``--jobs N`` passed as ``probeseq --jobs N prepare``);
(b) the first ``probeseq analyze`` of the sample run after it: target <= 25 s, PASS or FAIL;
(c) a second analyze, warm: the baseline of (b) in the same run (what no compiling costs);
(d) for reference, the first analyze without prepare on a second fresh copy (the old way);
(e) the first analyze of simulated 3- and 4-metal runs after prepare.

After (b) and (e) it counts the compiled-kernel cache files the analysis wrote (0 when prepare
compiled every kernel it uses). ``--quick`` skips (d) and (e). Everything is made in a
temporary folder and deleted afterwards. Exit code 0 when (b) passes. About three minutes on
two cores.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = Path("sample_data") / "rodnet7-batch-150C"
TARGET_S = 25.0
MORE_METALS = {3: "Co,Zn,Ni", 4: "Co,Zn,Ni,Cu"}


def fresh_copy(dest: Path, from_worktree: bool) -> Path:
    """Copy the repository's files into ``dest`` (created); no compiled-kernel cache comes along."""
    dest.mkdir(parents=True)
    if from_worktree:
        names = subprocess.run(["git", "ls-files", "-z", "--cached", "--others", "--exclude-standard"], cwd=ROOT,
                               check=True, capture_output=True).stdout.decode().split("\0")
        for name in filter(None, names):
            src = ROOT / name
            if src.is_file():  # a tracked file deleted in the working tree is left out
                (dest / name).parent.mkdir(parents=True, exist_ok=True)
                shutil.copy2(src, dest / name)
    else:
        archive = subprocess.run(["git", "archive", "HEAD"], cwd=ROOT, check=True, capture_output=True).stdout
        subprocess.run(["tar", "-x", "-C", str(dest)], input=archive, check=True)
    for cache in dest.rglob("__pycache__"):
        shutil.rmtree(cache)
    return dest


def kernel_files(copy: Path) -> int:
    """Compiled-kernel cache files (numba's ``*.nbc``) in the copy."""
    return sum(1 for _ in copy.rglob("*.nbc"))


def child_env(copy: Path) -> dict:
    env = {k: v for k, v in os.environ.items() if k not in ("NUMBA_CACHE_DIR", "PYTHONPATH")}
    env["PYTHONPATH"] = str(copy)
    env.setdefault("PYTHONWARNINGS", "ignore")
    return env


def check_import(copy: Path) -> str:
    """Where a child process imports probeseq from; exits when it is not the copy."""
    where = subprocess.run([sys.executable, "-c", "import probeseq; print(probeseq.__file__)"], cwd=copy,
                           env=child_env(copy), check=True, capture_output=True, text=True).stdout.strip()
    if not Path(where).resolve().is_relative_to(copy.resolve()):
        raise SystemExit(f"the child imports probeseq from {where}, not from the copy {copy}")
    return where


def probeseq(copy: Path, *args, quiet: bool = True) -> float:
    """Wall time (s) of one ``probeseq`` command in a fresh process in the copy; exits on failure."""
    cmd = [sys.executable, "-m", "probeseq", *map(str, args)]
    t0 = time.perf_counter()
    proc = subprocess.run(cmd, cwd=copy, env=child_env(copy), capture_output=True, text=True)
    dt = time.perf_counter() - t0
    if proc.returncode != 0:
        raise SystemExit(f"failed (exit {proc.returncode}): {' '.join(cmd)}\n{proc.stderr[-2000:]}")
    if not quiet:
        for line in proc.stdout.splitlines():
            print(f"      {line}")
    return dt


def analyze(copy: Path, out: Path, *args) -> tuple:
    """(wall s, timings_s.total s, kernel cache files written) of one first or later analysis."""
    before = kernel_files(copy)
    wall = probeseq(copy, "analyze", *args, "--out", out, "--force")
    total = json.loads((out / "results.json").read_text())["timings_s"]["total"]
    return wall, total, kernel_files(copy) - before


def more_metals(copy: Path, tmp: Path) -> list:
    """(e): simulate a 3- and a 4-metal run (outside the timing), then time their first analysis."""
    rows = []
    for k, metals in MORE_METALS.items():
        ions = tmp / f"sim{k}" / "ions.h5"
        probeseq(copy, "simulate", ions, "--metals", metals, "--pattern", "long-block", "--tip-radius", "6",
                 "--depth", "20", "-q")
        rows.append((k, *analyze(copy, tmp / f"out{k}", ions, "--metals", metals, "--lattice",
                                 ions.with_suffix(".lattice.toml"))))
    return rows


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--from-worktree", action="store_true",
                    help="copy the working tree's files (uncommitted work included) instead of HEAD's")
    ap.add_argument("--jobs", type=int, default=None, help="worker processes of prepare (default: one per core)")
    ap.add_argument("--quick", action="store_true", help="skip (d) the old way and (e) 3 and 4 metals")
    a = ap.parse_args()
    jobs = [] if a.jobs is None else ["--jobs", a.jobs]
    with tempfile.TemporaryDirectory(prefix="bench-firstrun-") as d:
        tmp = Path(d)
        what = "the working tree" if a.from_worktree else "HEAD"
        copy = fresh_copy(tmp / "copy", a.from_worktree)
        print(f"fresh copy of {what}: probeseq imported from {check_import(copy)}; "
              f"kernel cache files: {kernel_files(copy)}")
        t_prep = probeseq(copy, *jobs, "prepare", quiet=False)
        print(f"(a) probeseq prepare                 {t_prep:6.1f} s   ({kernel_files(copy)} kernel cache files)")
        wall, total, new = analyze(copy, tmp / "out_b", SAMPLE)
        ok = wall <= TARGET_S
        print(f"(b) first analyze after prepare      {wall:6.1f} s   target <= {TARGET_S:g} s: "
              f"{'PASS' if ok else 'FAIL'}   (timings_s.total {total:.1f} s; kernel cache files written: {new})")
        warm, total_c, _ = analyze(copy, tmp / "out_c", SAMPLE)
        print(f"(c) second analyze (warm, baseline)  {warm:6.1f} s   (timings_s.total {total_c:.1f} s; "
              f"(b) - (c) = {wall - warm:.1f} s)")
        if not a.quick:
            old = fresh_copy(tmp / "old", a.from_worktree)
            check_import(old)
            t_old, total_d, new_d = analyze(old, tmp / "out_d", SAMPLE)
            print(f"(d) first analyze without prepare    {t_old:6.1f} s   (the old way; timings_s.total "
                  f"{total_d:.1f} s; kernel cache files written: {new_d})")
            for k, w, tot, n in more_metals(copy, tmp):
                print(f"(e) first analyze, {k} metals          {w:6.1f} s   (timings_s.total {tot:.1f} s; "
                      f"kernel cache files written: {n})")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
