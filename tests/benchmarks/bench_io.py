"""Benchmark: ion-list readers against a bare read of the same data, and streamed-pass memory.

Run:  python tests/benchmarks/bench_io.py [--sizes 1e7,1e8] [--csv-size 1e7] [--dir DIR]

Prints, per size: HDF5 reader throughput (M ions/s), its ratio to a bare h5py read of the same
four datasets measured in the same run (target <= 1.5 for an uncompressed 1e8-ion file), the
checksum cost, and the peak resident memory of a streamed pass (chunked read + one numpy reduction)
in a fresh process. For text: CSV reader throughput on a 1e7-ion file (target >= 2 M ions/s).
Files are made at run time from a simulated run tiled to size and deleted afterwards.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np

from probeseq.io.ions import IonList
from probeseq.io.readers import read_ions, write_ions
from probeseq.simulation.simulate import simulate_run


def make_ions(n: int, dtype=np.float32) -> IonList:
    base = simulate_run(pattern="random", top_radius_nm=8, depth_nm=40, seed=1).ions
    reps = -(-n // len(base))
    cols = {}
    for c in ("x", "y", "z", "mass_to_charge"):
        a = np.tile(getattr(base, c).astype(dtype), reps)[:n]
        cols[c] = a
    # stack the tiles in depth so the file looks like one long run
    cols["z"] = cols["z"] + np.repeat(np.arange(reps, dtype=dtype) * dtype(40.0), len(base))[:n]
    return IonList(**cols)


def bare_read(path):
    with h5py.File(path, "r") as f:
        g = f["ions"]
        return [g[c][...] for c in ("x", "y", "z", "mass_to_charge")]


def best_of(fn, k=3):
    t = []
    for _ in range(k):
        t0 = time.perf_counter()
        r = fn()
        t.append(time.perf_counter() - t0)
        del r
    return min(t)


STREAM = """
import sys, numpy as np
from probeseq.io import iter_ion_chunks
s = 0.0; n = 0
for c in iter_ion_chunks(sys.argv[1], chunk_size=int(sys.argv[2])):
    s += float(np.sum(c.mass_to_charge, dtype=np.float64)); n += len(c)
# VmHWM (peak resident set of this process image); ru_maxrss would carry the parent's peak across exec
hwm = [l for l in open("/proc/self/status") if l.startswith("VmHWM")][0].split()[1]
print(n, int(hwm) / 1024.0)
"""


def streamed_peak_mb(path, chunk):
    r = subprocess.run([sys.executable, "-c", STREAM, str(path), str(chunk)], capture_output=True, text=True,
                       check=True)
    n, mb = r.stdout.split()
    return int(n), float(mb)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", default="1e7,1e8")
    ap.add_argument("--csv-size", default="1e7")
    ap.add_argument("--dir", default=None)
    args = ap.parse_args()
    tmp = Path(args.dir or tempfile.mkdtemp(prefix="probeseq-bench-"))
    tmp.mkdir(parents=True, exist_ok=True)
    ok = True
    print(f"{'ions':>12} {'read s':>8} {'M ions/s':>9} {'bare s':>8} {'ratio':>6} {'sha256 s':>8} {'stream peak MB':>15}")
    for n in [int(float(s)) for s in args.sizes.split(",")]:
        ions = make_ions(n)
        p = tmp / f"bench_{n}.h5"
        write_ions(ions, p)
        del ions
        bare_read(p)  # warm the page cache for both contenders
        t_bare = best_of(lambda: bare_read(p))
        t_read = best_of(lambda: read_ions(p, checksum=False))
        t0 = time.perf_counter()
        from probeseq.io.formats import file_sha256
        file_sha256(p)
        t_sha = time.perf_counter() - t0
        n_read, peak = streamed_peak_mb(p, 4_000_000)
        assert n_read == n
        ratio = t_read / t_bare
        print(f"{n:>12d} {t_read:8.3f} {n / t_read / 1e6:9.1f} {t_bare:8.3f} {ratio:6.2f} {t_sha:8.2f} {peak:15.0f}")
        if n >= 10 ** 8:
            good = ratio <= 1.5
            ok &= good
            print(f"  target: HDF5 read of 1e8 ions within 1.5x of a bare h5py read -> {'PASS' if good else 'FAIL'}")
        p.unlink()
    n = int(float(args.csv_size))
    ions = make_ions(n, dtype=np.float64)
    p = tmp / f"bench_{n}.csv"
    write_ions(ions, p, float_format="%.4f")
    del ions
    t_csv = best_of(lambda: read_ions(p, checksum=False), k=2)
    t_csv_sha = best_of(lambda: read_ions(p, checksum=True), k=1)
    rate = n / t_csv / 1e6
    good = rate >= 2.0
    ok &= good
    print(f"CSV {n} ions ({p.stat().st_size / 1e6:.0f} MB): {t_csv:.2f} s = {rate:.1f} M ions/s "
          f"({n / t_csv_sha / 1e6:.1f} M ions/s with sha256); target >= 2 M ions/s -> {'PASS' if good else 'FAIL'}")
    p.unlink()
    print("ALL PASS" if ok else "SOME FAIL")


if __name__ == "__main__":
    main()
