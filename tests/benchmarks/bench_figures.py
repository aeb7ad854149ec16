"""Benchmark of the figures and the report.

Run: python tests/benchmarks/bench_figures.py

1. The sequence-tracks figure of 50 rods x 500 sites, rendered and saved as PNG (300 dpi), SVG and
   PDF (target < 5 s each). Baseline measured in the same run: the same sites drawn the plain way,
   one rectangle per site in a PolyCollection, saved as PDF.
2. The report of the sample run sample_data/rodnet7-batch-150C (target < 10 s), with the time of the
   analysis itself as the baseline.
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from probeseq.decoding.decode import decode, sample_model
from probeseq.decoding.model import DecoderParams  # noqa: E402
from probeseq.lattice.rodcolumns import RodColumns  # noqa: E402
from probeseq.outputs.figures import save_figure
from probeseq.outputs.tracks import plot_tracks  # noqa: E402

TRACKS_TARGET_S = 5.0
REPORT_TARGET_S = 10.0


def deep_run(n_rods=50, n_sites=500, seed=1):
    """Columns and decoding of n_rods x n_sites drawn from the rod model (persistence 0.8, eta 0.5)."""
    params = DecoderParams.from_components(np.array([[0.9, 0.1], [0.1, 0.9]]), 0.5, 0.1, 0.02)
    counts, _ = sample_model(params, n_rods, n_sites, random_state=seed)
    g = np.arange(n_rods)
    xy = np.column_stack([(g % 10) * 1.5, (g // 10) * 1.5]).astype(float)
    mask = np.ones((n_rods, n_sites), bool)
    mask[:5, :40] = False
    cols = RodColumns(counts=counts, mask=mask, metals=("Co", "Zn"), rod_xy_nm=xy, tilt=np.zeros(2), z_ref_nm=0.0,
                      site_z_nm=np.arange(n_sites) * 0.2267, pitch_nm=0.2267)
    return cols, decode(cols, params)


def timed(fn, repeat=3):
    ts = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t)
    return statistics.median(ts)


def naive_tracks_pdf(cols, dec, path):
    """One rectangle per site, no merging, no compound paths (the baseline)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.collections import PolyCollection
    from matplotlib.figure import Figure

    from probeseq.utils.palette import metal_colour

    fig = Figure(figsize=(7.0, 6.0))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(1, 1, 1)
    r, s = np.nonzero(dec.mask)
    z = cols.site_z_nm[s]
    h = cols.pitch_nm / 2
    verts = np.stack([np.column_stack([z - h, r - 0.4]), np.column_stack([z - h, r + 0.4]),
                      np.column_stack([z + h, r + 0.4]), np.column_stack([z + h, r - 0.4])], axis=1)
    colours = [metal_colour(int(k)) for k in dec.viterbi[r, s]]
    ax.add_collection(PolyCollection(verts, facecolors=colours, edgecolors="none"))
    ax.autoscale_view()
    save_figure(fig, path)


def main():
    print("probeseq figures benchmark")
    cols, dec = deep_run()
    print(f"tracks figure: {cols.n_rods} rods x {cols.n_sites} sites, target < {TRACKS_TARGET_S:g} s each")
    ok = True
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        t0 = time.perf_counter()
        naive_tracks_pdf(cols, dec, tmp / "naive.pdf")
        base = time.perf_counter() - t0
        print(f"  baseline, one rectangle per site, PDF: {base:.2f} s")
        ids = np.arange(cols.n_rods)
        for ext in ("png", "svg", "pdf"):
            t = timed(lambda: plot_tracks(cols, dec, tmp / f"tracks.{ext}", rods=ids, size="two-column", dpi=300))
            size_kb = (tmp / f"tracks.{ext}").stat().st_size / 1024
            flag = "PASS" if t < TRACKS_TARGET_S else "FAIL"
            ok &= t < TRACKS_TARGET_S
            print(f"  tracks -> {ext}: {t:.2f} s (median of 3), {size_kb:.0f} kB, {t / base:.2f}x baseline  {flag}")

        from probeseq.io.readers import read_ions
        from probeseq.lattice.model import Lattice
        from probeseq.outputs.report import write_report
        from probeseq.pipeline.analysis import analyze
        from probeseq.pipeline.options import AnalysisOptions

        sample = ROOT / "sample_data" / "rodnet7-batch-150C"
        ions = read_ions(sample / "ions.h5")
        lattice = Lattice.from_toml(sample / "lattice.toml")
        t0 = time.perf_counter()
        result = analyze(ions, ("Co", "Zn"), lattice, options=AnalysisOptions())
        t_an = time.perf_counter() - t0
        print(f"report of {sample.name} ({len(ions)} ions, {result.columns.n_rods} rods x {result.columns.n_sites} "
              f"sites), target < {REPORT_TARGET_S:g} s")
        print(f"  baseline, the analysis itself: {t_an:.2f} s")
        t0 = time.perf_counter()
        path = write_report(result, tmp / "report.html", ions=ions)
        t_rep = time.perf_counter() - t0
        flag = "PASS" if t_rep < REPORT_TARGET_S else "FAIL"
        ok &= t_rep < REPORT_TARGET_S
        print(f"  write_report: {t_rep:.2f} s, {path.stat().st_size / 1024:.0f} kB, {t_rep / t_an:.2f}x analysis  {flag}")
    print("overall", "PASS" if ok else "FAIL")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
