"""Run one hostile case and check what the user would see.

A case runs in a worker process (a persistent Python process that has imported probeseq once and
runs each command in-process with its standard output and error redirected to files), or, with
``isolation="subprocess"``, in a fresh ``python -m probeseq`` process. Either way there is a wall
time limit: a command still running at the limit is a hang, and the whole process group is killed.

The checks, per case:

* exit code non-zero, or zero only when the input was valid or a ``warning:`` line was printed;
* no ``Traceback`` and no ``internal error`` on standard error;
* on failure exactly one ``error:`` line, the last one, with only progress and warning lines before;
* every file of the case's input tree has the same SHA-256 afterwards (nothing changed or removed);
* every new output (file or folder) is complete, or absent; nothing written outside the case's
  work and input folders; no hidden staging folders left behind.

This file is also the worker program: ``python harness.py --serve`` reads one JSON job per line.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import select
import shutil
import signal
import subprocess
import sys
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path

TIMEOUT_S = 60.0
STDERR_KEEP = 4000

_ALLOWED_STDERR = (
    re.compile(r"^\[\s*[\d.]+ s\] "),             # progress lines of analyze
    re.compile(r"^warning: "),
    re.compile(r"^simulated and analysed \d+/\d+ runs"),  # progress of plan
    re.compile(r"^\s*$"),
)
_STAGING = re.compile(r"^\..+\.(staging|previous)-[0-9a-f]+$")

# Marker file of a command's output folder -> files that a complete folder holds.
_MARKERS = {
    "results.json": ("results.json", "tracks.csv", "runs.csv", "columns.h5", "decoded.h5", "report.html"),
    "registration.json": ("registration.json", "columns.h5", "density.png"),
    "decoding.json": ("decoding.json", "tracks.csv", "runs.csv"),
    "comparison.json": ("comparison.json", "comparison.csv", "differences.csv"),
}


# ---------------------------------------------------------------------- worker side
def _serve():
    """Worker loop: one JSON job per line on stdin, one JSON reply per line on the saved stdout."""
    import traceback
    import warnings

    proto = os.fdopen(os.dup(1), "w", buffering=1)
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, 1)
    os.environ.pop("PROBESEQ_DEBUG", None)
    os.environ.setdefault("MPLBACKEND", "Agg")
    from probeseq.cli.main import main

    home = os.getcwd()
    proto.write(json.dumps({"ready": True}) + "\n")
    for line in sys.stdin:
        job = json.loads(line)
        sys.stdout.flush()
        sys.stderr.flush()
        saved = os.dup(1), os.dup(2)
        code = None
        with open(job["out"], "wb") as fo, open(job["err"], "wb") as fe:
            os.dup2(fo.fileno(), 1)
            os.dup2(fe.fileno(), 2)
            try:
                os.chdir(job["cwd"])
                sys.argv = ["probeseq", *job["argv"]]
                with warnings.catch_warnings():  # fresh warning registry: every case may warn again
                    try:
                        code = main(list(job["argv"]))
                    except SystemExit as e:
                        sys.stderr.write(f"[harness] SystemExit escaped main(): {e.code!r}\n")
                        code = e.code if isinstance(e.code, int) else 1
                    except BaseException:  # anything escaping main() is a finding: show it
                        traceback.print_exc()
                        code = -1
            finally:
                sys.stdout.flush()
                sys.stderr.flush()
                os.dup2(saved[0], 1)
                os.dup2(saved[1], 2)
                os.close(saved[0])
                os.close(saved[1])
                os.chdir(home)
        proto.write(json.dumps({"code": code}) + "\n")


# ---------------------------------------------------------------------- parent side
class Runner:
    """Runs probeseq command lines with a wall-time limit.

    Parameters
    ----------
    isolation : "worker" or "subprocess"
        ``worker`` reuses one Python process for many commands (fast); ``subprocess`` starts
        ``python -m probeseq`` for every command (slow, fully isolated).
    timeout : float
        Wall-time limit per command, seconds; over it the command counts as a hang.
    """

    def __init__(self, isolation: str = "worker", timeout: float = TIMEOUT_S):
        if isolation not in ("worker", "subprocess"):
            raise ValueError(f"isolation must be 'worker' or 'subprocess', not {isolation!r}")
        self.isolation = isolation
        self.timeout = float(timeout)
        self._proc = None

    # -- worker management
    def _env(self):
        env = dict(os.environ)
        env.pop("PROBESEQ_DEBUG", None)
        env["MPLBACKEND"] = "Agg"
        return env

    def _start(self):
        self._proc = subprocess.Popen([sys.executable, str(Path(__file__).resolve()), "--serve"],
                                      stdin=subprocess.PIPE, stdout=subprocess.PIPE, env=self._env(),
                                      start_new_session=True, text=True, bufsize=1)
        reply = self._read_reply(120.0)
        if reply is None or not reply.get("ready"):
            self._kill()
            raise RuntimeError("the probeseq worker process did not start")

    def _read_reply(self, timeout):
        ready, _, _ = select.select([self._proc.stdout], [], [], timeout)
        if not ready:
            return None
        line = self._proc.stdout.readline()
        if not line:
            return {"eof": True}
        return json.loads(line)

    def _kill(self):
        if self._proc is None:
            return
        try:
            os.killpg(self._proc.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
        try:
            self._proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            pass
        for s in (self._proc.stdin, self._proc.stdout):
            try:
                s.close()
            except OSError:
                pass
        self._proc = None

    def close(self):
        """Stop the worker process (if any)."""
        if self._proc is not None and self._proc.poll() is None:
            try:
                self._proc.stdin.close()
                self._proc.wait(timeout=10)
            except (OSError, subprocess.TimeoutExpired):
                pass
        self._kill()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # -- running
    def run(self, argv, cwd, out_path, err_path):
        """Run ``probeseq *argv`` in ``cwd``; returns (exit code or None, "ok" | "hang" | "crash", seconds)."""
        t0 = time.perf_counter()
        if self.isolation == "subprocess":
            return self._run_subprocess(argv, cwd, out_path, err_path, t0)
        if self._proc is None or self._proc.poll() is not None:
            self._kill()
            self._start()
        job = {"argv": list(argv), "cwd": str(cwd), "out": str(out_path), "err": str(err_path)}
        try:
            self._proc.stdin.write(json.dumps(job) + "\n")
            self._proc.stdin.flush()
        except (BrokenPipeError, OSError):
            self._kill()
            return None, "crash", time.perf_counter() - t0
        reply = self._read_reply(self.timeout)
        dt = time.perf_counter() - t0
        if reply is None:
            self._kill()
            return None, "hang", dt
        if reply.get("eof"):
            code = self._proc.wait(timeout=10) if self._proc is not None else None
            self._kill()
            with open(err_path, "ab") as fe:
                fe.write(f"\n[harness] worker process died (exit status {code})\n".encode())
            return code, "crash", dt
        return reply["code"], "ok", dt

    def _run_subprocess(self, argv, cwd, out_path, err_path, t0):
        with open(out_path, "wb") as fo, open(err_path, "wb") as fe:
            p = subprocess.Popen([sys.executable, "-m", "probeseq", *argv], cwd=cwd, stdout=fo, stderr=fe,
                                 stdin=subprocess.DEVNULL, env=self._env(), start_new_session=True)
            try:
                code = p.wait(timeout=self.timeout)
            except subprocess.TimeoutExpired:
                try:
                    os.killpg(p.pid, signal.SIGKILL)
                except ProcessLookupError:
                    pass
                p.wait()
                return None, "hang", time.perf_counter() - t0
        if code < 0:
            return code, "crash", time.perf_counter() - t0
        return code, "ok", time.perf_counter() - t0


# ---------------------------------------------------------------------- file-tree checks
def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def snapshot(root: Path) -> dict:
    """Relative path -> content signature of everything under ``root`` (links are not followed)."""
    root = Path(root)
    out = {}
    if not root.exists():
        return out
    for dirpath, dirnames, filenames in os.walk(root, followlinks=False):
        d = Path(dirpath)
        rel_d = d.relative_to(root).as_posix()
        if rel_d != ".":
            out[rel_d + "/"] = "dir"
        for name in list(dirnames) + filenames:
            p = d / name
            rel = p.relative_to(root).as_posix()
            if p.is_symlink():
                out[rel] = "link:" + os.readlink(p)
            elif name in filenames:
                if p.is_file():
                    try:
                        out[rel] = _sha256(p)
                    except OSError as e:
                        out[rel] = f"unreadable:{e.errno}"
                else:
                    out[rel] = "special"
    return out


def _file_problem(p: Path):
    """None if ``p`` looks like a complete output file, else what is wrong."""
    import tomllib

    try:
        size = p.stat().st_size
    except OSError as e:
        return f"unreadable ({e.strerror})"
    if size == 0:
        return "empty file"
    suf = p.suffix.lower()
    try:
        if suf == ".json":
            json.loads(p.read_text(encoding="utf-8"))
        elif suf == ".toml":
            tomllib.loads(p.read_text(encoding="utf-8"))
        elif suf in (".h5", ".hdf5"):
            import h5py

            with h5py.File(p, "r"):
                pass
        elif suf == ".png":
            if p.read_bytes()[:8] != b"\x89PNG\r\n\x1a\n":
                return "not a PNG file"
        elif suf == ".pdf":
            data = p.read_bytes()
            if not data.startswith(b"%PDF") or b"%%EOF" not in data[-1024:]:
                return "incomplete PDF file"
        elif suf == ".svg":
            if b"</svg>" not in p.read_bytes()[-4096:]:
                return "incomplete SVG file"
    except Exception as e:  # any failure to read it back makes it incomplete
        return f"unreadable {suf} ({type(e).__name__})"
    return None


def _dir_problem(p: Path):
    """None if folder ``p`` is a complete output folder (or holds only complete outputs)."""
    for marker, needed in _MARKERS.items():
        if (p / marker).is_file():
            for name in needed:
                q = p / name
                if not q.is_file():
                    return f"missing {name}"
                prob = _file_problem(q)
                if prob:
                    return f"{name}: {prob}"
            return None
    children = sorted(p.iterdir())
    if not children:
        return "empty folder left behind"
    for c in children:
        if c.is_symlink():
            continue
        prob = _dir_problem(c) if c.is_dir() else _file_problem(c)
        if prob:
            return f"{c.name}: {prob}"
    return None


def output_problem(p: Path):
    """None if a new output path is complete; otherwise a short description."""
    if p.is_symlink():
        return None
    if p.is_dir():
        return _dir_problem(p)
    if p.is_file():
        return _file_problem(p)
    return None


def _new_tops(before: dict, after: dict) -> list:
    """New paths of ``after`` whose parent existed in ``before`` (the roots of what was created)."""
    tops = []
    for k in sorted(after):
        if k in before:
            continue
        rel = k.rstrip("/")
        parent = rel.rsplit("/", 1)[0] + "/" if "/" in rel else ""
        if parent == "" or parent in before:
            tops.append(rel)
    return tops


# ---------------------------------------------------------------------- outcome
@dataclass
class Outcome:
    """What happened when one case ran, and every property it broke."""

    case_id: str
    command: str
    kind: str
    expect: str
    status: str
    exit_code: int | None
    seconds: float
    message: str
    problems: list = field(default_factory=list)
    stderr: str = ""

    @property
    def failed(self) -> bool:
        """True when any checked property was broken."""
        return bool(self.problems)

    def to_dict(self) -> dict:
        """Plain-JSON form."""
        return asdict(self)


def judge_stderr(text: str, code, expect: str):
    """(status, message, problems) from standard error and the exit code."""
    lines = [ln.rstrip() for ln in re.split(r"[\r\n]+", text)]
    nonempty = [ln for ln in lines if ln.strip()]
    problems = []
    errors = [ln for ln in nonempty if ln.startswith("error:")]
    warns = [ln for ln in nonempty if ln.startswith("warning:")]
    message = errors[-1] if errors else (nonempty[-1] if nonempty else "")
    has_tb = "Traceback" in text
    internal = "internal error" in text.lower() or code == 3
    if has_tb:
        problems.append("traceback on stderr")
        tb = [ln for ln in nonempty if not ln.startswith(" ") and ("Error" in ln or "Exception" in ln)]
        if tb:
            message = tb[-1]
    if internal:
        problems.append("internal error")
    if code != 0:
        if not errors:
            problems.append("non-zero exit without an 'error:' line")
        else:
            if len(errors) > 1:
                problems.append(f"{len(errors)} error lines")
            if nonempty[-1] != errors[-1]:
                problems.append("error line is not the last line of stderr")
            stray = [ln for ln in nonempty if not ln.startswith("error:")
                     and not any(rx.match(ln) for rx in _ALLOWED_STDERR)]
            if stray and not has_tb:
                problems.append(f"error spans several lines / stray stderr: {stray[0][:120]!r}")
    if has_tb:
        status = "traceback"
    elif internal:
        status = "internal-error"
    elif code != 0:
        status = "clean-error" if errors and not problems else "unclear-error"
    elif expect == "error":
        status = "accepted-warning" if warns else "accepted-silently"
        if not warns:
            problems.append("invalid input accepted without a warning")
    else:
        status = "accepted-warning" if warns else "accepted-valid"
    return status, message, problems


def case_layout(case_dir: Path):
    """(input folder, work folder) of a case; both sit three levels below the case folder so that
    a path escaping upwards with ``../../../`` still lands inside the case folder and is seen."""
    deep = Path(case_dir) / "box" / "a" / "b"
    return deep / "in", deep / "work"


def run_case(case, base: Path, root: Path, runner: Runner, keep: bool = False) -> Outcome:
    """Build ``case`` under ``root``, run it with ``runner`` and check every property."""
    from .builders import build, expand

    case_dir = Path(root) / case.slug
    if case_dir.exists():
        shutil.rmtree(case_dir)
    in_dir, work_dir = case_layout(case_dir)
    in_dir.mkdir(parents=True)
    work_dir.mkdir(parents=True)
    build(case, in_dir, work_dir, Path(base))
    argv = expand(case.argv, in_dir, work_dir)
    before_in = snapshot(in_dir)
    before_all = snapshot(case_dir)
    out_path, err_path = case_dir / "stdout.txt", case_dir / "stderr.txt"
    code, how, dt = runner.run(argv, work_dir, out_path, err_path)
    text = err_path.read_bytes().decode("utf-8", "replace") if err_path.exists() else ""
    for f in (out_path, err_path):
        if f.exists():
            f.unlink()
    problems = []
    if how == "hang":
        status, message = "hang", f"no exit after {runner.timeout:.0f} s"
        problems.append(f"hang (killed after {runner.timeout:.0f} s)")
        _, _, more = judge_stderr(text, 1, case.expect)
        problems += [p for p in more if p in ("traceback on stderr", "internal error")]
    elif how == "crash":
        status, message = "crash", f"process died (exit status {code}); " + text.strip()[-200:]
        problems.append(f"process crashed (status {code})")
    else:
        status, message, problems = judge_stderr(text, code, case.expect)

    after_in = snapshot(in_dir)
    after_all = snapshot(case_dir)
    for k, sig in before_in.items():
        if k not in after_in:
            problems.append(f"input removed: {k}")
        elif after_in[k] != sig:
            problems.append(f"input changed: {k}")
    rel_in = in_dir.relative_to(case_dir).as_posix() + "/"
    rel_work = work_dir.relative_to(case_dir).as_posix() + "/"
    for k in after_all:
        name = k.rstrip("/").rsplit("/", 1)[-1]
        if _STAGING.match(name):
            problems.append(f"leftover staging folder: {k}")
    for top in _new_tops(before_all, after_all):
        if not (top + "/").startswith((rel_in, rel_work)) and top + "/" not in (rel_in, rel_work):
            problems.append(f"wrote outside the work and input folders: {top}")
            continue
        if _STAGING.match(top.rsplit("/", 1)[-1]):
            continue
        prob = output_problem(case_dir / top)
        if prob:
            problems.append(f"incomplete output {top}: {prob}")
    if not keep:
        shutil.rmtree(case_dir, ignore_errors=True)
    return Outcome(case_id=case.id, command=case.command, kind=case.kind, expect=case.expect, status=status,
                   exit_code=code, seconds=round(dt, 3), message=message[:300], problems=problems,
                   stderr=text[-STDERR_KEEP:])


if __name__ == "__main__" and "--serve" in sys.argv[1:]:
    _serve()
