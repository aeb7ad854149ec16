"""Benchmark: what soft evidence costs `analyze` on a 1e7-ion run.

Run:  python tests/benchmarks/bench_soft_evidence.py [--repeat 2] [--reuse DIR]

The run is made by the simulator at benchmark time (``bench_analyze.make_files``, about 1e7 ions)
unless ``--reuse DIR`` gives a folder with its ``run_1x.h5`` and ``lattice.toml``. In fresh
processes, alternating, ``analyze`` (the library behind the command: ``study.batch.analyze_run``,
output folder written) runs with soft evidence (the default) and with one drawn metal per ion
(``AnalysisOptions(soft_evidence=False)``: the decoder as it was before soft evidence, less the
thinning). Printed: the median wall times, their ratio (target <= 1.3), and the stage timings of
one run of each (``timings_s`` of results.json).
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

CHILD = r"""
import json, sys, time
t = time.perf_counter()
from probeseq.lattice.model import Lattice
from probeseq.pipeline import AnalysisOptions
from probeseq.study.batch import analyze_run
opts = AnalysisOptions(soft_evidence=sys.argv[4] == "1")
res = analyze_run(sys.argv[1], sys.argv[3], options=opts, metals=("Co", "Zn"),
                  lattice=Lattice.from_toml(sys.argv[2]), force=True)
el = time.perf_counter() - t
timings = json.load(open(sys.argv[3] + "/results.json"))["timings_s"]
print(json.dumps({"seconds": el, "timings": timings}))
"""

TARGET = 1.3


def _one(path, lat, out, soft: bool):
    r = subprocess.run([sys.executable, "-c", CHILD, str(path), str(lat), str(out), "1" if soft else "0"],
                       capture_output=True, text=True)
    if r.returncode != 0 or not r.stdout.strip():
        raise RuntimeError(r.stderr.strip()[-800:])
    return json.loads(r.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=2, help="runs of each kind (medians compared)")
    ap.add_argument("--reuse", default=None, help="folder holding run_1x.h5 and lattice.toml")
    args = ap.parse_args(argv)
    from bench_analyze import make_files

    tmp = Path(args.reuse) if args.reuse else Path(tempfile.mkdtemp(prefix="soft_evidence_"))
    try:
        if args.reuse:
            path, lat = next(tmp.glob("run_1x.h5")), tmp / "lattice.toml"
        else:
            files, lat = make_files(tmp, [1e7])
            path = next(iter(files.values()))
        _one(path, lat, tmp / "warm", True)  # compile and warm the page cache
        _one(path, lat, tmp / "warm", False)
        runs = {True: [], False: []}
        for _ in range(args.repeat):
            for soft in (False, True):
                runs[soft].append(_one(path, lat, tmp / f"out_{int(soft)}", soft))
        med = {k: float(np.median([r["seconds"] for r in v])) for k, v in runs.items()}
        ratio = med[True] / med[False]
        listed = {k: ", ".join(f"{r['seconds']:.1f}" for r in v) for k, v in runs.items()}
        print(f"analyze, drawn metals (baseline): {med[False]:.1f} s (runs {listed[False]})")
        print(f"analyze, soft evidence (default): {med[True]:.1f} s (runs {listed[True]})")
        for soft in (False, True):
            t = runs[soft][0]["timings"]
            keys = [k for k in ("binning", "decoding", "statistics", "total") if k in t]
            print(f"   {'soft' if soft else 'drawn'} stages: " + ", ".join(f"{k} {t[k]:.2f} s" for k in keys))
        print(f"ratio soft / drawn {ratio:.2f} (target <= {TARGET}): {'PASS' if ratio <= TARGET else 'FAIL'}")
        return 0
    finally:
        if not args.reuse:
            shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
