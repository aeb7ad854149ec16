"""Drawing a set of figures, each laid out once, and the report's copy of each without drawing it again.

:func:`run_figure_jobs` takes a list of :class:`FigureJob` (a figure's name, the function that
draws it, the formats to save) and runs them here, or (when two CPUs may be used and one is free,
:func:`two_processes_pay`) in two processes: this one and a forked child (the child inherits the data, nothing is pickled but the
results). Both take the next job from one shared counter, so the longer figures need no planning
of who draws what. Matplotlib holds the GIL while it lays out and renders, so threads would not
help (DEVELOPERS.md, "Output speed").

For each figure the report needs a PNG at its own resolution. When the figure's PNG file was
saved at a resolution at least that high, the report's copy is that file scaled down (a Lanczos
filter, tens of milliseconds) instead of a second layout and rendering of the whole figure
(0.2-1 s each).
"""

from __future__ import annotations

import io
import os
import pickle
import tempfile
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

from ..runtime import FolderChild
from ..utils.marks import PNG_PIL_KWARGS
from ..utils.textformat import plain_log_ticks

__all__ = ["FigureJob", "FiguresAhead", "run_figure_jobs", "report_png", "two_processes_pay", "others_running", "warm_up", "prewarm"]


@dataclass(frozen=True)
class FigureJob:
    """One figure to draw.

    Attributes
    ----------
    name : str
        Figure name (file stem in the figures folder, key of the report's figures).
    make : callable
        ``make()`` draws the figure and returns a matplotlib Figure (or None: no figure); it may
        save its own files.
    exts : tuple of str
        Formats :func:`probeseq.outputs.figures.save_figure` saves after ``make`` (e.g. ``("svg", "png")``);
        the first save lays the figure out and the others keep that layout.
    """

    name: str
    make: Callable
    exts: tuple = ()


def _png_dpi(data: bytes):
    """Resolution of a PNG in dots per inch from its pHYs chunk (None when it states none)."""
    i = data.find(b"pHYs", 0, 4096)
    if i < 0 or len(data) < i + 13 or data[i + 12] != 1:
        return None
    per_metre = int.from_bytes(data[i + 4:i + 8], "big")
    return per_metre * 0.0254 if per_metre > 0 else None


def report_png(fig, png_file, dpi: float, stated_dpi: float | None = None) -> bytes:
    """The PNG of ``fig`` at ``dpi`` dots per inch for the report.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    png_file : Path or None
        A PNG file of the same figure already saved; used, scaled down, when its resolution is at
        least ``dpi``.
    dpi : float, dots per inch
        Resolution of the result.
    stated_dpi : float, dots per inch, optional
        Resolution written in the PNG's pHYs chunk (default ``dpi``); the report takes the display
        width from it, so a smaller value shows the figure enlarged.

    Returns
    -------
    bytes
        PNG data.
    """
    stated = float(dpi if stated_dpi is None else stated_dpi)
    if png_file is not None and Path(png_file).is_file():
        data = Path(png_file).read_bytes()
        have = _png_dpi(data)
        if have is not None and have >= dpi - 1e-6:
            from PIL import Image

            with Image.open(io.BytesIO(data)) as im:
                w, h = im.size
                size = (max(1, round(w * dpi / have)), max(1, round(h * dpi / have)))
                rgba = im.convert("RGBA")
                # reducing_gap: a box reduction by a whole factor first, then Lanczos (about 5x faster)
                small = rgba.resize(size, Image.LANCZOS, reducing_gap=3.0) if size != im.size else rgba
                buf = io.BytesIO()
                small.save(buf, format="png", dpi=(stated, stated), **PNG_PIL_KWARGS)
            return buf.getvalue()
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, pil_kwargs={"dpi": (stated, stated), **PNG_PIL_KWARGS})
    return buf.getvalue()


def warm_up(exts=("png", "svg")):
    """Pay matplotlib's one-time costs of a process (imports of the backends of ``exts``, the font
    files, the Unicode glyphs of ion labels) on a tiny figure drawn into memory; once per process and set of
    formats (about 1 s in a fresh process, 0.25 s more with "pdf": its font subsetter)."""
    exts = tuple(sorted(set(exts)))
    with _WARM_LOCK:
        if exts in _WARMED:
            return
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        fig = Figure(figsize=(1.0, 1.0))
        FigureCanvasAgg(fig)
        ax = fig.add_subplot()
        ax.semilogy([1.0, 2.0], [1.0, 100.0])
        plain_log_ticks(ax.yaxis)
        ax.set_title("Co\u00b2\u207a warm-up", fontsize=7)
        from .figures import save_figure

        with tempfile.TemporaryDirectory(prefix="probeseq-warm-") as d:
            for ext in exts:
                save_figure(fig, Path(d) / f"warm.{ext}", dpi=30)
        _WARMED.add(exts)


_WARM_LOCK = threading.Lock()
_WARMED: set = set()


def prewarm(exts=("png", "svg")) -> threading.Thread:
    """Start :func:`warm_up` in a background thread and return it (the caller may go on with work
    that releases the GIL, such as the compiled kernels of the analysis, meanwhile). A later
    :func:`warm_up` or :func:`run_figure_jobs` waits for it through a lock instead of repeating it.
    A failure in the thread is ignored: the figures' own drawing reports it."""
    def run():
        try:
            warm_up(exts)
        except Exception:  # the figure jobs meet and report the same problem
            pass

    t = threading.Thread(target=run, name="probeseq-figure-warm-up", daemon=True)
    t.start()
    return t


def _one(job: FigureJob, folder: Path, report_dpi):
    """("ok", PNG bytes or None) or ("failed", message) or None (the job drew no figure)."""
    from .figures import save_figure

    try:
        fig = job.make()
        if fig is None:
            return None
        if isinstance(fig, (str, os.PathLike)):  # a PNG file the job saved itself: the report embeds it
            return ("ok", None if report_dpi is None else Path(fig).read_bytes())
        for ext in job.exts:
            save_figure(fig, folder / f"{job.name}.{ext}")
            if fig.get_layout_engine() is not None:  # laid out once, by the first format
                fig.set_layout_engine("none")
        if report_dpi is None:
            return ("ok", None)
        dpi, stated = report_dpi(fig)
        return ("ok", report_png(fig, folder / f"{job.name}.png", dpi, stated))
    except Exception as e:  # a figure must never cost the results
        text = str(e).splitlines()[0] if str(e) else ""
        return ("failed", f"figure '{job.name}' not drawn: {type(e).__name__}: {text}")


def two_processes_pay(n_jobs: int | None, cpus: int | None = None, load: float | None = None) -> bool:
    """Whether drawing the figures in two processes is worth its fork.

    Parameters
    ----------
    n_jobs : int or None
        ``--jobs`` (:func:`probeseq.runtime.jobs`); None: not limited. 1 keeps everything here.
    cpus : int, optional
        CPUs this process may run on (default: its affinity set).
    load : float, optional
        Runnable processes other than this one, now (default: :func:`others_running`).

    Returns
    -------
    bool
        True when at least two CPUs may be used and at least one of them is free: fewer than
        ``cpus - 1`` other processes are runnable.
    """
    if n_jobs is not None and n_jobs < 2:
        return False
    if cpus is None:
        try:
            cpus = len(os.sched_getaffinity(0))
        except (AttributeError, OSError):
            cpus = os.cpu_count() or 1
    if cpus < 2:
        return False
    if load is None:
        load = others_running()
    return load < cpus - 1


def others_running(samples: int = 5, interval_s: float = 0.002) -> float:
    """Runnable processes and threads on the machine other than this one: the median over a few
    readings of the kernel's count of runnable tasks (``/proc/loadavg``, fourth field) less one.

    Where that count cannot be read, the one-minute load average less one (at least 0).
    """
    import statistics
    import time

    counts = []
    for n in range(samples):
        try:
            with open("/proc/loadavg", encoding="ascii") as fh:
                counts.append(int(fh.read().split()[3].split("/")[0]) - 1)
        except (OSError, ValueError, IndexError):
            break
        if n + 1 < samples:
            time.sleep(interval_s)
    if counts:
        return float(max(0.0, statistics.median(counts)))
    try:
        return max(0.0, os.getloadavg()[0] - 1.0)
    except (AttributeError, OSError):  # no load figures on this system: assume a free CPU
        return 0.0


def _work(jobs, folder, report_dpi, counter, out_path):
    """Take jobs from the shared counter until none is left; results pickled to ``out_path``."""
    done = {}
    while True:
        with counter.get_lock():
            i = counter.value
            counter.value += 1
        if i >= len(jobs):
            break
        done[i] = _one(jobs[i], folder, report_dpi)
        if out_path is not None:  # written after each figure: a crash loses only the figure in hand
            tmp = f"{out_path}.part"
            with open(tmp, "wb") as fh:
                pickle.dump(done, fh)
            os.replace(tmp, out_path)
    return done


def run_figure_jobs(jobs, folder, report_dpi=None, parallel: bool | None = None) -> dict:
    """Draw and save ``jobs`` in this process and a forked child.

    Parameters
    ----------
    jobs : list of FigureJob
        Longest first: each process takes the next one as it becomes free.
    folder : Path
        Folder of the figure files.
    report_dpi : callable, optional
        ``report_dpi(fig)`` gives the (rendered, stated) resolution of a figure's PNG in the report
        (dots per inch, see :func:`report_png`); with it each result carries that PNG.
    parallel : bool, optional
        False draws everything here; default (:func:`two_processes_pay`): in two processes when
        ``--jobs`` allows two or more and a CPU is free now (the fork pays off only with a free CPU:
        DEVELOPERS.md, "Output speed").

    Notes
    -----
    ``make`` may also return the path of a PNG file it wrote itself; the report then embeds that
    file as it is.

    Returns
    -------
    dict
        name -> ``("ok", PNG bytes or None)`` or ``("failed", one-line message)``; names of jobs
        that drew no figure are absent. Jobs are listed in the order given.
    """
    import multiprocessing as mp

    from .. import runtime

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    jobs = list(jobs)
    results = {}
    child, out_path = None, None
    if parallel is None:
        parallel = two_processes_pay(runtime.jobs())
    try:
        counter = mp.get_context("fork").Value("i", 0) if parallel and len(jobs) > 1 else None
    except (ValueError, OSError):  # no fork on this system
        counter = None
    if counter is not None:
        warm_up(tuple({"png"} | {e for j in jobs for e in j.exts}))  # once, before the fork, not in each process
        fd, out_path = tempfile.mkstemp(prefix="probeseq-figures-", suffix=".pkl")
        os.close(fd)
        os.unlink(out_path)
        child = runtime.Background(_work, jobs, folder, report_dpi, counter, out_path)
        if child.proc is None:  # ran in place: it took every job
            counter = None
    try:
        if counter is not None:
            results.update(_work(jobs, folder, report_dpi, counter, None))
        if child is not None and child.proc is not None:
            child.proc.join()
        if out_path is not None and os.path.exists(out_path):
            with open(out_path, "rb") as fh:
                results.update(pickle.load(fh))
        for i, job in enumerate(jobs):  # whatever the child did not finish (it died) is drawn here
            if i not in results:
                results[i] = _one(job, folder, report_dpi)
    finally:
        if child is not None:
            child.kill()
        for p in (out_path, f"{out_path}.part") if out_path else ():
            if os.path.exists(p):
                os.unlink(p)
    return {jobs[i].name: results[i] for i in sorted(results) if results[i] is not None}


def _draw_ahead(jobs, folder, report_dpi, out_path):
    """Draw every job in order (the child of :class:`FiguresAhead`); results pickled to ``out_path``
    after each figure, by name. The child runs at the lowest priority: it takes only the CPU the
    analysis leaves idle, and never slows the parent's parallel kernels (a loop split over two
    threads waits for the slower one, so a third process at equal priority cost the decoding
    more than the figures' own time)."""
    try:
        os.nice(19)
    except (AttributeError, OSError):  # no priorities here: draw at the same priority
        pass
    done = {}
    for job in jobs:
        done[job.name] = _one(job, folder, report_dpi)
        tmp = f"{out_path}.part"
        with open(tmp, "wb") as fh:
            pickle.dump(done, fh)
        os.replace(tmp, out_path)


class FiguresAhead(FolderChild):
    """Figures that need only the count stage's results (the spectrum, the density), drawn in a
    forked child while the parent decodes: the CPU the decoding and statistics leave idle (their
    serial parts) draws them, and the output stage only moves their files in.

    Parameters
    ----------
    make_jobs : callable
        ``make_jobs(folder)`` gives the FigureJob s, saving into ``folder`` (:attr:`folder`, a private
        temporary folder).
    report_dpi : callable, optional
        As in :func:`run_figure_jobs`.

    Notes
    -----
    Nothing is started when this process cannot fork a child (no fork, or a daemonic process such
    as a dask worker): :meth:`collect` then returns nothing and the figures are drawn as usual. A
    figure the child did not finish is drawn by the output stage too.
    """

    def __init__(self, make_jobs, report_dpi=None):
        from .. import runtime

        self.folder = Path(tempfile.mkdtemp(prefix="probeseq-figures-ahead-"))
        self.jobs = list(make_jobs(self.folder))
        self._out = self.folder / "figures-ahead.pkl"
        if not self.jobs or not runtime.can_fork_child():
            return
        warm_up(tuple({"png"} | {e for j in self.jobs for e in j.exts}))  # before the fork, once
        self.start(_draw_ahead, self.jobs, self.folder, report_dpi, str(self._out))

    def collect(self, folder) -> dict:
        """Wait for the child, move its files into ``folder`` and return ``{name: (status, value)}``
        of the figures it finished (the values of :func:`run_figure_jobs`); the temporary folder is
        removed."""
        import shutil

        done = {}
        try:
            if self.started:
                self.wait()
                if self._out.exists():
                    with open(self._out, "rb") as fh:
                        done = {k: v for k, v in pickle.load(fh).items() if v is not None}
                folder = Path(folder)
                folder.mkdir(parents=True, exist_ok=True)
                for p in sorted(self.folder.iterdir()):
                    if p.name not in (self._out.name, f"{self._out.name}.part"):
                        shutil.move(str(p), str(folder / p.name))
        finally:
            self.discard()
        return done
