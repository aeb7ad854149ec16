"""Benchmark: `analyze` end to end on 1e7- and 1e8-ion runs, against a bare pass over the same file.

Run:  python tests/benchmarks/bench_analyze.py [--sizes 1e7,1e8] [--dir DIR]

The runs are made by the simulator at benchmark time (one ~1e7-ion run; the 1e8-ion file stacks
ten copies of it in depth) and deleted afterwards. For each size, in a fresh process each:

* ``analyze`` wall time (targets: 1e7 < 60 s, 1e8 < 300 s) and its peak resident memory from
  the kernel's VmHWM (target for 1e8 < 3 GB);
* ``timings_s.read_to_counts`` (reading through binning) and its ratio to a baseline measured in
  the same run: a bare chunked h5py read of the four datasets plus one vectorised numpy pass over
  them (target ratio <= 3);
* throughput in M ions/s.
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

import h5py
import numpy as np

CHILD = r"""
import json, sys, time
from probeseq.cli import main
t = time.perf_counter()
code = main(["analyze", sys.argv[1], "--metals", "Co,Zn", "--lattice", sys.argv[2], "--out", sys.argv[3], "-q", "--force"])
el = time.perf_counter() - t
hwm = [l for l in open("/proc/self/status") if l.startswith("VmHWM")][0].split()[1]
print(json.dumps({"code": code, "seconds": el, "peak_mb": int(hwm) / 1024}))
"""

BASELINE = r"""
import sys, time, h5py, numpy as np
t = time.perf_counter()
n_chunk = 4_000_000
acc = 0.0
with h5py.File(sys.argv[1], "r") as f:
    g = f["ions"]; n = g["x"].shape[0]
    bufs = {c: np.empty(n_chunk, g[c].dtype) for c in ("x", "y", "z", "mass_to_charge")}
    for s in range(0, n, n_chunk):
        e = min(n, s + n_chunk)
        for c, b in bufs.items():
            g[c].read_direct(b, np.s_[s:e], np.s_[0:e - s])
        # one vectorised numpy pass over the chunk
        acc += float(np.sum(bufs["x"][:e - s] + bufs["y"][:e - s] + bufs["z"][:e - s] + bufs["mass_to_charge"][:e - s]))
print(time.perf_counter() - t)
"""


def make_files(tmp: Path, sizes):
    from probeseq.io import write_ions
    from probeseq.simulate import simulate_run

    t = time.perf_counter()
    run = simulate_run(pattern="long-block", top_radius_nm=30, half_angle_deg=10, depth_nm=150, tilt_deg=0.3,
                       seed=424242)
    print(f"simulated {len(run.ions):.3e} ions in {time.perf_counter() - t:.0f} s")
    lat = tmp / "lattice.toml"
    lat.write_text(run.lattice.to_toml())
    base = run.ions
    n0 = len(base)
    cols = {c: getattr(base, c).astype(np.float32) for c in ("x", "y", "z", "mass_to_charge")}
    # copies are stacked by a crystal translation along the rods (a whole number of site pitches), so
    # rods and site planes continue from one copy to the next
    pitch = run.truth["pitch_nm"]
    k = int(round(150.0 / pitch))
    dz = k * pitch * np.cos(np.radians(run.truth["distortion"]["tilt_deg"]))
    dxy = np.asarray(run.rod_tilt) * dz
    del run
    files = {}
    for n in sizes:
        reps = max(1, int(round(n / n0)))
        p = tmp / f"run_{reps}x.h5"
        with h5py.File(p, "w") as f:
            g = f.create_group("ions")
            g.attrs["length_unit"] = "nm"
            ds = {c: g.create_dataset(c, shape=(reps * n0,), dtype=np.float32, chunks=(1_000_000,))
                  for c in cols}
            shift = {"x": dxy[0], "y": dxy[1], "z": dz, "mass_to_charge": 0.0}
            for r in range(reps):
                for c, a in cols.items():
                    ds[c][r * n0:(r + 1) * n0] = a + np.float32(shift[c] * r)
        files[reps * n0] = p
    return files, lat


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", default="1e7,1e8")
    ap.add_argument("--dir", default=None)
    args = ap.parse_args()
    tmp = Path(args.dir or tempfile.mkdtemp(prefix="probeseq-bench-"))
    tmp.mkdir(parents=True, exist_ok=True)
    sizes = [float(s) for s in args.sizes.split(",")]
    files, lat = make_files(tmp, sizes)
    ok = True
    for n, p in sorted(files.items()):
        out = tmp / f"out_{n}"
        subprocess.run([sys.executable, "-c", BASELINE, str(p)], capture_output=True)  # warm the page cache
        base = float(subprocess.run([sys.executable, "-c", BASELINE, str(p)], capture_output=True, text=True,
                                    check=True).stdout)
        r = subprocess.run([sys.executable, "-c", CHILD, str(p), str(lat), str(out)], capture_output=True, text=True)
        if r.returncode != 0 or not r.stdout.strip():
            print(f"{n:.2e} ions: analyze failed: {r.stderr.strip()[-500:]}")
            ok = False
            continue
        info = json.loads(r.stdout.strip().splitlines()[-1])
        if info["code"] != 0:
            print(f"{n:.2e} ions: analyze exited {info['code']}: {r.stderr.strip()[-400:]}")
            ok = False
            continue
        res = json.loads((out / "results.json").read_text())
        tim = res["timings_s"]
        rtc = tim["read_to_counts"]
        limit = 60 if n < 5e7 else 300
        print(f"{n:.2e} ions: analyze {info['seconds']:.1f} s (target < {limit} s), peak memory {info['peak_mb']:.0f} MB, "
              f"label {res['classification']['label']}, {res['columns']['n_rods']} rods")
        print(f"   read_to_counts {rtc:.1f} s = {n / rtc / 1e6:.1f} M ions/s; baseline (bare read + one numpy pass) "
              f"{base:.2f} s; ratio {rtc / base:.2f} (target <= 3)")
        print(f"   stage timings: {tim}")
        checks = [info["seconds"] < limit, rtc / base <= 3.0]
        if n >= 5e7:
            checks.append(info["peak_mb"] < 3072)
            print(f"   peak memory {info['peak_mb']:.0f} MB (target < 3072 MB)")
        good = all(checks)
        ok &= good
        print("   " + ("PASS" if good else "FAIL"))
        shutil.rmtree(out, ignore_errors=True)
    for p in files.values():
        p.unlink()
    print("ALL PASS" if ok else "SOME FAIL")


if __name__ == "__main__":
    main()
