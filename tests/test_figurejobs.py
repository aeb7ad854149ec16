"""Figures drawn as jobs (probeseq.outputs.figurejobs): files, report PNGs, failures, two processes."""

import io

import numpy as np
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from PIL import Image

from probeseq.outputs.figurejobs import FigureJob, report_png, run_figure_jobs
from probeseq.utils.marks import MARK_BYTES


def _figure(width_in=6.0):
    fig = Figure(figsize=(width_in, 2.0), layout="constrained")
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    ax.plot(np.arange(10), np.arange(10) ** 2)
    ax.set_title("squares")
    return fig


def _boom():
    raise ValueError("no data\nsecond line")


def _dpi_of(data):
    with Image.open(io.BytesIO(data)) as im:
        return im.size, im.info.get("dpi")


@pytest.mark.parametrize("parallel", [False, True])
def test_jobs_write_files_and_report_pngs(tmp_path, parallel):
    jobs = [FigureJob("a", _figure, ("svg", "png")), FigureJob("none", lambda: None, ("png",)),
            FigureJob("bad", _boom, ("png",)), FigureJob("b", lambda: _figure(3.0), ("pdf",))]
    out = run_figure_jobs(jobs, tmp_path, lambda fig: (120.0 * 1.5, 120.0), parallel=parallel)
    assert list(out) == ["a", "bad", "b"]  # order of the jobs; the job without a figure is absent
    assert out["bad"] == ("failed", "figure 'bad' not drawn: ValueError: no data")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.png", "a.svg", "b.pdf"]
    assert MARK_BYTES in (tmp_path / "a.png").read_bytes()
    # 'a': scaled down from its 300-dpi file; 'b' (no PNG file): drawn at 180 dpi; both state 120 dpi
    for name in ("a", "b"):
        status, data = out[name]
        assert status == "ok"
        (w, h), dpi = _dpi_of(data)
        width_in = 6.0 if name == "a" else 3.0
        assert w == pytest.approx(width_in * 180, abs=1) and h == pytest.approx(2.0 * 180, abs=1)
        assert dpi[0] == pytest.approx(120.0, abs=0.1)
    assert not list(tmp_path.glob(".*"))


def test_report_png_downscales_only_from_finer_files(tmp_path):
    fig = _figure()
    fig.savefig(tmp_path / "f.png", dpi=100)
    coarse = report_png(fig, tmp_path / "f.png", 150.0)  # the file is coarser: the figure is drawn again
    assert _dpi_of(coarse)[0] == (900, 300)
    fig.savefig(tmp_path / "g.png", dpi=300)
    fine = report_png(fig, tmp_path / "g.png", 150.0)
    assert _dpi_of(fine)[0] == (900, 300)
    a = np.asarray(Image.open(io.BytesIO(coarse)).convert("L"), dtype=float)
    b = np.asarray(Image.open(io.BytesIO(fine)).convert("L"), dtype=float)
    assert np.mean(np.abs(a - b)) < 12  # the same picture (anti-aliasing differs)


def test_two_processes_only_with_a_free_cpu_and_jobs_allowing_it():
    from probeseq.outputs.figurejobs import others_running, two_processes_pay

    assert two_processes_pay(None, cpus=2, load=0.0)  # a free CPU, jobs not limited
    assert two_processes_pay(2, cpus=4, load=2.0)
    assert not two_processes_pay(None, cpus=2, load=1.0)  # the other CPU is busy: the fork would not pay
    assert not two_processes_pay(1, cpus=8, load=0.0)  # --jobs 1 keeps everything in one process
    assert not two_processes_pay(None, cpus=1, load=0.0)
    assert others_running() >= 0.0


def test_figures_drawn_ahead_in_a_child_are_moved_in_and_cleaned_up(tmp_path):
    import os

    from probeseq.outputs.figurejobs import FiguresAhead

    def jobs(folder):
        def mark():
            (folder / "pid.txt").write_text(str(os.getpid()))
            return _figure()

        return [FigureJob("a", mark, ("png",)), FigureJob("bad", _boom, ("png",)),
                FigureJob("none", lambda: None, ("png",))]

    ahead = FiguresAhead(jobs, lambda fig: (60.0, 60.0))
    assert ahead.started
    private = ahead.folder
    dest = tmp_path / "figures"
    done = ahead.collect(dest)
    assert int((dest / "pid.txt").read_text()) != os.getpid()  # drawn by the child, not here
    assert sorted(done) == ["a", "bad"] and done["a"][0] == "ok" and done["bad"][0] == "failed"
    assert _dpi_of(done["a"][1])[1][0] == pytest.approx(60.0, abs=0.1)
    assert sorted(p.name for p in dest.iterdir()) == ["a.png", "pid.txt"]
    assert not private.exists()  # its temporary folder is gone, nothing else is left behind
    # an analysis that fails: discard stops the child and removes the folder
    other = FiguresAhead(jobs, None)
    other.discard()
    assert not other.folder.exists()


def test_an_analysis_moves_in_the_figures_drawn_ahead(tmp_path, monkeypatch):
    # the count stage's figures come from the child started when the counts were done
    import probeseq.pipeline.analysis as an
    from probeseq.simulation.simulate import simulate_run
    from probeseq.study.batch import analyze_run

    started, folders = [], []
    real = an.figures_ahead

    def spy(counted):
        a = real(counted)
        started.append(a is not None and a.started)
        folders.append(a.folder)
        return a

    monkeypatch.setattr(an, "figures_ahead", spy)
    monkeypatch.setattr("probeseq.outputs.figurejobs.two_processes_pay", lambda *a, **k: True)
    monkeypatch.setattr(an, "AHEAD_MIN_SITES", 0)  # a small run: drawn ahead all the same here
    run = simulate_run(pattern="long-block", top_radius_nm=5, depth_nm=18, seed=21)
    from probeseq.io.readers import write_ions

    src = tmp_path / "run.h5"
    write_ions(run.ions, src)
    out = analyze_run(src, tmp_path / "out", metals=("Co", "Zn"), lattice=run.lattice)
    assert started == [True]
    figs = {p.name for p in (out.outdir / "figures").iterdir()}
    assert {"spectrum.png", "spectrum.svg", "density.png", "tracks.png"} <= figs
    assert not folders[0].exists()  # the child's temporary folder is removed
