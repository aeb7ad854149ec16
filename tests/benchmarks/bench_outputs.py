"""Benchmark: the whole `analyze` command against its analysis, and the time of its outputs.

Run:  python tests/benchmarks/bench_outputs.py [--repeat 3] [--big]

For the sample run sample_data/rodnet7-batch-150C, in fresh processes after one warm-up run (the
compiled kernels' cache and the page cache are warm), the median over ``--repeat`` runs of:

* ``timings_s.total`` (ranging through classification) and ``timings_s.startup`` (target <= 1 s);
* the whole command's wall time, and its ratio to ``timings_s.total`` (target <= 5);
* the output stage: from the moment the ``writing:`` progress line appears on standard error to the
  end of the process (tables, figures, report, the folder swap, the summary).

Baseline measured in the same run: a bare interpreter that imports probeseq's command line and
exits (the fixed cost of any command). With ``--big`` a 1e7-ion run is simulated (as in
``bench_analyze.py``) and analysed once: target, the output stage <= 30 % of the wall time.
Output folders are made in a temporary folder and deleted afterwards.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample_data" / "rodnet7-batch-150C"
RATIO_TARGET = 5.0
STARTUP_TARGET_S = 1.0
BIG_SHARE_TARGET = 0.30


def run_once(args, out: Path) -> dict:
    """One fresh `probeseq analyze` process: wall time (s), output-stage time (s) and its timings_s."""
    cmd = [sys.executable, "-m", "probeseq", "analyze", *map(str, args), "--out", str(out), "--force"]
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, cwd=ROOT)
    t_writing = None
    for line in proc.stderr:
        if t_writing is None and "] writing:" in line:
            t_writing = time.perf_counter()
    proc.wait()
    t1 = time.perf_counter()
    if proc.returncode != 0:
        raise SystemExit(f"analyze failed (exit {proc.returncode}): {' '.join(cmd)}")
    tim = json.loads((out / "results.json").read_text())["timings_s"]
    return {"wall": t1 - t0, "outputs": t1 - (t_writing or t1), "total": tim["total"], "startup": tim["startup"]}


def baseline_s() -> float:
    """Wall time (s) of an interpreter that imports the command line and exits."""
    t = time.perf_counter()
    subprocess.run([sys.executable, "-c", "import probeseq.cli.main"], check=True, cwd=ROOT)
    return time.perf_counter() - t


def sample(repeat: int, tmp: Path) -> bool:
    run_once([SAMPLE], tmp / "warm")  # warm-up: kernel cache, page cache
    rows = [run_once([SAMPLE], tmp / f"out{i}") for i in range(repeat)]
    base = statistics.median(baseline_s() for _ in range(3))
    med = {k: statistics.median(r[k] for r in rows) for k in rows[0]}
    ratio = med["wall"] / med["total"]
    print(f"sample run, median of {repeat} fresh processes (warm):")
    for i, r in enumerate(rows):
        print(f"  run {i}: wall {r['wall']:.2f} s, total {r['total']:.2f} s, startup {r['startup']:.2f} s, "
              f"outputs {r['outputs']:.2f} s")
    print(f"  baseline (import the command line and exit): {base:.2f} s")
    ok_ratio, ok_start = ratio <= RATIO_TARGET, med["startup"] <= STARTUP_TARGET_S
    print(f"  timings_s.total {med['total']:.2f} s, wall {med['wall']:.2f} s, wall/total {ratio:.2f} "
          f"(target <= {RATIO_TARGET:g}): {'PASS' if ok_ratio else 'FAIL'}")
    print(f"  startup {med['startup']:.2f} s (target <= {STARTUP_TARGET_S:g} s): {'PASS' if ok_start else 'FAIL'}")
    print(f"  output stage {med['outputs']:.2f} s ({med['outputs'] / med['wall']:.0%} of the wall time; "
          f"{med['outputs'] / base:.1f}x the baseline)")
    return ok_ratio and ok_start


def big(tmp: Path) -> bool:
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from bench_analyze import make_files

    files, lat = make_files(tmp, [1e7])
    ions = next(iter(files.values()))
    r = run_once([ions, "--lattice", lat, "--metals", "Co,Zn"], tmp / "big")
    share = r["outputs"] / r["wall"]
    ok = share <= BIG_SHARE_TARGET
    print(f"1e7 ions: wall {r['wall']:.1f} s, total {r['total']:.1f} s, outputs {r['outputs']:.1f} s = {share:.0%} "
          f"of the wall time (target <= {BIG_SHARE_TARGET:.0%}): {'PASS' if ok else 'FAIL'}")
    return ok


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--big", action="store_true", help="also a 1e7-ion run (simulated, several minutes)")
    a = ap.parse_args()
    os.environ.setdefault("PYTHONWARNINGS", "ignore")
    with tempfile.TemporaryDirectory(prefix="bench-outputs-") as d:
        ok = sample(a.repeat, Path(d))
        if a.big:
            ok = big(Path(d)) and ok
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
