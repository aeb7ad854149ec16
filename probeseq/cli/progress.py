"""Progress of many runs (a batch, a plan) on the terminal, and a batch's summary table.

The progress line goes to standard error and only to a terminal (a log file or a pipe gets the
summary alone): runs done, running, failed and waiting, and the time since the start, redrawn
every second. A run that fails prints its one-line reason above the line at once, so a long batch
shows a failure long before its end. "Running" is the runs handed to workers and not finished:
one per worker thread, as the runs are handed out (:func:`probeseq.study.cluster.run_tasks`).
"""

from __future__ import annotations

import shlex
import sys
import threading
import time

from .common import say

__all__ = ['RunProgress', 'batch_summary']

_CLEAR = "\r\x1b[K"


class RunProgress:
    """A live line ``runs: 3/8 done (1 failed), 2 running, 3 waiting, 41 s`` on a terminal.

    Parameters
    ----------
    quiet : bool
        Print nothing.
    what : str
        What a run is called on the line ("runs", "simulated runs").
    announce : bool
        Say where the runs go (``str(where)`` of :meth:`started`) on a line of its own.
    stream : file, optional
        Where to draw (standard error); drawn only when it is a terminal.
    """

    def __init__(self, quiet: bool, what: str = "runs", announce: bool = False, stream=None):
        self.stream = stream if stream is not None else sys.stderr
        self.tty = (not quiet) and bool(getattr(self.stream, "isatty", lambda: False)())
        self.what, self.announce = what, announce
        self.t0 = time.perf_counter()
        self.n_runs = self.width = self.ok = self.failed = 0
        self.where = ""
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread = None

    def started(self, n_runs: int, where) -> None:
        """The work starts: ``n_runs`` runs, ``where.count`` at a time (``str(where)`` says where)."""
        self.n_runs, self.width, self.where = int(n_runs), max(1, int(where.count)), str(where)
        if self.tty and self.announce:
            self.stream.write(f"{self.n_runs} {self.what} on {self.where}\n")
        if self.tty and self._thread is None:
            self._thread = threading.Thread(target=self._tick, daemon=True)
            self._thread.start()
        self._draw()

    def finished(self, ok: bool, run: str = "", error: str | None = None) -> None:
        """One run finished; a failure prints ``run: failed: reason`` above the line."""
        with self._lock:
            if ok:
                self.ok += 1
            else:
                self.failed += 1
            if self.tty and not ok and error:
                self.stream.write(f"{_CLEAR}{run}: failed: {error}\n")
        self._draw()

    def counts(self) -> dict:
        """Runs ``done``, ``failed`` (of the done), ``running`` and ``waiting`` now."""
        done = self.ok + self.failed
        running = min(self.width, max(0, self.n_runs - done))
        return {"done": done, "failed": self.failed, "running": running,
                "waiting": max(0, self.n_runs - done - running)}

    def _draw(self):
        if not self.tty:
            return
        with self._lock:
            c = self.counts()
            self.stream.write(f"{_CLEAR}{self.what}: {c['done']}/{self.n_runs} done ({c['failed']} failed), "
                              f"{c['running']} running, {c['waiting']} waiting, "
                              f"{time.perf_counter() - self.t0:.0f} s")
            self.stream.flush()

    def _tick(self):
        while not self._stop.wait(1.0):
            self._draw()

    def close(self) -> None:
        """Stop redrawing and clear the line (call before printing the summary)."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join()
        if self.tty:
            with self._lock:
                self.stream.write(_CLEAR)
                self.stream.flush()


def batch_summary(outcomes, out, seconds: float, verbose: bool = False) -> None:
    """Print the summary table of a batch: one line per run, sorted by run folder name.

    Parameters
    ----------
    outcomes : list of BatchOutcome
    out : Path
        The batch's output folder (named in the line on ``compare``).
    seconds : float, s
        Wall time of the batch.
    verbose : bool
        Also each run's reasons and warnings.
    """
    n_failed = sum(not o.ok for o in outcomes)
    say(f"summary: {len(outcomes)} runs in {seconds:.0f} s, {len(outcomes) - n_failed} analysed, {n_failed} failed")
    for o in sorted(outcomes, key=lambda o: o.run):
        if o.ok:
            say(f"  {o.run:32s} {o.label:18s} confidence {o.confidence:.2f} {o.seconds:8.1f} s")
        else:
            say(f"  {o.run:32s} failed: {o.error}")
        if verbose:
            for r in o.reasons:
                say(f"  {'':32s}   - {r}")
            for w in o.warnings:
                say(f"  {'':32s}   warning: {w}")
    if n_failed < len(outcomes):
        say(f"compare them: probeseq compare {shlex.quote(str(out))}")
