"""Batches and plans through dask (probeseq.study.cluster): a cluster gives the serial results.

A ``LocalCluster`` of two single-threaded worker processes analyses a batch of two tiny simulated
runs and one broken run folder; a run's results must equal those of the same run analysed in this
process (one run is compared: the figures make each analysis take seconds), the broken run is reported in one line while the others finish,
and ``compare`` reads the finished batch at once. Workers that die are tried once more, on the
local cluster and on the process pool used without dask; a scheduler that cannot be reached, or
one named without dask installed, is one line naming the address. The tests that need dask skip
cleanly without it (``pytest.importorskip``).
"""

import contextlib
import io
import json
import os
import subprocess
import sys
import time
from pathlib import Path

import pytest

from probeseq.cli.main import main
from probeseq.cli.progress import RunProgress
from probeseq.exceptions import InputError, ProbeseqError
from probeseq.lattice.model import Lattice
from probeseq.pipeline.options import AnalysisOptions
from probeseq.simulation.simulate import simulate_run
from probeseq.study import cluster
from probeseq.study.batch import analyze_batch, analyze_run
from probeseq.study.compare import compare_runs, load_runs
from probeseq.study.plan import plan_experiment

OPTIONS = AnalysisOptions(n_boot=20, n_starts=1, seed=5)
# files that hold results; figures and the report are drawings of them, and results.json is
# compared without its timings
RESULT_FILES = ("tracks.csv", "runs.csv", "decoded.h5", "columns.h5", "bootstrap.h5", "ranges.toml")


def _write_run(folder: Path, pattern: str, seed: int, temperature: int):
    folder.mkdir(parents=True)
    paths = simulate_run(pattern=pattern, top_radius_nm=5.0, depth_nm=12.0, seed=seed).write(folder / "ions.h5")
    (folder / "run.toml").write_text(
        f'[sample]\nname = "{folder.name}"\nsynthesis_temperature_c = {temperature}\n\n'
        f'[run]\nions = "ions.h5"\nmetals = ["Co", "Zn"]\nlattice = "{Path(paths["lattice"]).name}"\n',
        encoding="utf-8")


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """A batch folder of two tiny runs and a broken one, and the first run analysed here, alone."""
    root = tmp_path_factory.mktemp("cluster_batch")
    src = root / "runs"
    _write_run(src / "r1", "long-block", 31, 120)
    _write_run(src / "r2", "random", 32, 180)
    (src / "r0-broken").mkdir()
    (src / "r0-broken" / "run.toml").write_text('[run]\nions = "missing.h5"\nmetals = ["Co", "Zn"]\n'
                                                'lattice = "honeycomb"\n')
    serial = root / "serial"
    analyze_run(src / "r1", serial / "r1", options=OPTIONS)
    return {"root": root, "src": src, "serial": serial}


@pytest.fixture(scope="module")
def local_cluster():
    """A LocalCluster of two single-threaded worker processes (skips without dask)."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1, silence_logs=50,
                                  scheduler_kwargs={"dashboard": False, "dashboard_address": ":0"}) as lc:
        yield lc


@pytest.fixture(scope="module")
def on_cluster(runs, local_cluster):
    out = runs["root"] / "on_cluster"
    seen, where = [], []
    outcomes = analyze_batch(runs["src"], out, options=OPTIONS, scheduler=local_cluster.scheduler_address,
                             progress=seen.append, started=lambda n, w: where.append((n, w)))
    return {"out": out, "outcomes": outcomes, "seen": seen, "where": where}


def _h5_content(path: Path) -> dict:
    """Every dataset (name, dtype, shape, bytes) and attribute of an HDF5 file."""
    import h5py

    out = {}
    with h5py.File(path, "r") as f:
        def visit(name, obj):
            for k, v in obj.attrs.items():
                out[f"{name}@{k}"] = repr(v)
            if isinstance(obj, h5py.Dataset):
                data = obj[()]
                out[name] = (str(obj.dtype), obj.shape, data.tobytes() if hasattr(data, "tobytes") else repr(data))

        visit("/", f)
        f.visititems(visit)
    return out


def _results(folder: Path) -> dict:
    res = json.loads((folder / "results.json").read_text())
    res.pop("timings_s")
    return res


def test_cluster_batch_equals_the_serial_run(runs, on_cluster):
    (n, where), = on_cluster["where"]
    assert n == 3 and where.kind == "scheduler" and where.count == 2
    assert str(where).startswith("the dask scheduler at tcp://")
    a, b = runs["serial"] / "r1", on_cluster["out"] / "r1"
    for f in RESULT_FILES:
        if f.endswith(".h5"):  # every dataset and attribute (HDF5 may leave unused bytes as they were in memory)
            assert _h5_content(a / f) == _h5_content(b / f), f"r1/{f} differs from the serial run"
        else:
            assert (a / f).read_bytes() == (b / f).read_bytes(), f"r1/{f} differs from the serial run"
    assert _results(a) == _results(b)
    # the two runs of the batch differ, so equal files are not an accident of the comparison
    assert (b / "tracks.csv").read_bytes() != (on_cluster["out"] / "r2" / "tracks.csv").read_bytes()
    assert _results(b) != _results(on_cluster["out"] / "r2")


def test_a_failed_run_is_reported_in_one_line_and_the_others_finish(runs, on_cluster):
    outcomes = on_cluster["outcomes"]
    assert [o.run for o in outcomes] == ["r0-broken", "r1", "r2"]  # in the order of the runs
    assert sorted(o.run for o in on_cluster["seen"]) == ["r0-broken", "r1", "r2"]  # each reported once
    bad, r1, r2 = outcomes
    assert not bad.ok and "missing.h5" in bad.error and "\n" not in bad.error
    assert r1.ok and r2.ok and r1.label == "long-block"
    assert not (on_cluster["out"] / "r0-broken").exists()


def test_compare_reads_the_finished_batch_at_once(runs, on_cluster):
    records = load_runs([on_cluster["out"]])
    assert sorted(r.name for r in records) == ["r1", "r2"]
    comp = compare_runs(records, order_by="synthesis_temperature_c", random_state=0)
    assert [r.metadata["synthesis_temperature_c"] for r in comp.runs] == [120, 180]
    assert comp.differences  # the two runs are tested against each other


def test_plan_on_the_cluster_equals_the_serial_plan(local_cluster, monkeypatch):
    kw = dict(n_per_pattern=1, n_per_persistence=1, persistences=(0.3,), top_radius_nm=4.0, depth_nm=12.0,
              n_boot=20, seed=3)
    lat = Lattice.from_spec("square", a=1.2, repeat=0.7, sites_per_repeat=3)
    on_cluster = plan_experiment(("Co", "Zn"), lat, scheduler=local_cluster.scheduler_address, **kw)
    with monkeypatch.context() as m:
        m.setattr(cluster, "dask_available", lambda: False)
        serial = plan_experiment(("Co", "Zn"), lat, workers=1, **kw)  # one after the other, in this process
    assert on_cluster.n_runs == serial.n_runs == 6
    assert json.dumps(on_cluster.to_dict()) == json.dumps(serial.to_dict())


# ---------------------------------------------------------------------- workers that die
def _task(job):
    """A job that returns, raises, or kills its worker process (always, or only the first time)."""
    kind, marker = job
    if kind == "die" or (kind == "die-once" and not Path(marker).exists()):
        if marker:
            Path(marker).write_text("died once")
        os._exit(3)
    if kind == "raise":
        raise RuntimeError("bad job\nsecond line")
    return kind.upper()


def _lost(i, reason):
    return f"lost: {reason}"


def test_local_cluster_retries_a_run_whose_worker_died_once(tmp_path):
    pytest.importorskip("distributed")
    where = []
    got = cluster.run_tasks(_task, [("die-once", str(tmp_path / "m")), ("ok", None)], lost=_lost, workers=2,
                            started=where.append)
    assert where[0].kind == "local-cluster" and where[0].count == 2
    assert (tmp_path / "m").exists() and got == ["DIE-ONCE", "OK"]  # the first try died, the retry ran


def test_local_cluster_reports_a_run_whose_worker_died_twice(tmp_path):
    pytest.importorskip("distributed")
    order = []
    got = cluster.run_tasks(_task, [("a", None), ("die", None), ("raise", None), ("b", None)], lost=_lost,
                            workers=2, done=lambda i, r: order.append(i))
    assert got[0] == "A" and got[3] == "B"  # the others finish
    assert got[1].startswith("lost: the worker process running it died")
    assert got[2].startswith("lost: failed on its worker") and "bad job second line" in got[2]
    assert sorted(order) == [0, 1, 2, 3]


def test_without_dask_a_process_pool_retries_and_reports(tmp_path, monkeypatch):
    monkeypatch.setattr(cluster, "dask_available", lambda: False)
    where = []
    jobs = [("a", None), ("die", None), ("die-once", str(tmp_path / "m")), ("raise", None), ("b", None)]
    got = cluster.run_tasks(_task, jobs, lost=_lost, workers=2, started=where.append)
    assert where[0].kind == "processes" and "pip install probeseq[cluster]" in str(where[0])
    assert got[0] == "A" and got[2] == "DIE-ONCE" and got[4] == "B"
    assert got[1].startswith("lost: the worker process running it died")
    assert got[3].startswith("lost: failed on its worker")


# ---------------------------------------------------------------------- bad schedulers
def _cli(args):
    out, err = io.StringIO(), io.StringIO()
    t = time.perf_counter()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main([str(a) for a in args])
    return code, out.getvalue(), err.getvalue(), time.perf_counter() - t


def test_scheduler_without_dask_is_one_line_saying_how_to_install(runs, tmp_path, monkeypatch):
    monkeypatch.setattr(cluster, "dask_available", lambda: False)
    code, _, err, _ = _cli(["analyze", runs["src"], "--out", tmp_path / "o", "--scheduler", "tcp://10.0.0.5:8786"])
    assert code == 1 and err.count("\n") == 1 and "Traceback" not in err
    assert "--scheduler tcp://10.0.0.5:8786" in err and "pip install probeseq[cluster]" in err
    assert not (tmp_path / "o").exists()
    monkeypatch.setenv(cluster.SCHEDULER_ENV, "tcp://10.0.0.5:8786")
    with pytest.raises(InputError, match="PROBESEQ_SCHEDULER"):
        analyze_batch(runs["src"], tmp_path / "o", options=OPTIONS)


def test_unreachable_scheduler_is_one_line_naming_it_within_the_timeout(runs, tmp_path, monkeypatch):
    pytest.importorskip("distributed")
    monkeypatch.setattr(cluster, "CONNECT_TIMEOUT_S", 2.0)
    code, _, err, seconds = _cli(["analyze", runs["src"], "--out", tmp_path / "o", "--scheduler", "tcp://127.0.0.1:1"])
    assert code == 1 and err.count("\n") == 1 and "Traceback" not in err
    assert err.startswith("error: could not reach the dask scheduler at tcp://127.0.0.1:1 (--scheduler) within 2 s")
    assert seconds < 15 and not (tmp_path / "o").exists()
    monkeypatch.setenv(cluster.SCHEDULER_ENV, "no-port-here")
    code, _, err, _ = _cli(["plan", "--metals", "Co,Zn", "--lattice", "square", "--a", "1.2", "--repeat", "0.7"])
    assert code == 1 and err.count("\n") == 1 and "PROBESEQ_SCHEDULER no-port-here: not a usable" in err


def test_dask_is_imported_only_when_a_batch_runs():
    code = ("import sys, probeseq, probeseq.study.batch, probeseq.study.plan, probeseq.study.cluster, "
            "probeseq.cli.main; print(sorted(m for m in ('dask', 'distributed') if m in sys.modules))")
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(sys.path))
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=120)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"


# ---------------------------------------------------------------------- progress on a terminal
class _Terminal(io.StringIO):
    def isatty(self):
        return True


def test_progress_line_counts_runs_and_prints_a_failure_at_once():
    term = _Terminal()
    live = RunProgress(False, stream=term)
    live.started(8, cluster.Workers("local-cluster", 2))
    live.finished(True, "r1")
    live.finished(False, "r3", "the ion file 'x.h5' is missing")
    assert live.counts() == {"done": 2, "failed": 1, "running": 2, "waiting": 4}
    live.close()
    text = term.getvalue()
    assert "r3: failed: the ion file 'x.h5' is missing\n" in text
    assert "runs: 2/8 done (1 failed), 2 running, 4 waiting" in text
    pipe = io.StringIO()  # not a terminal: nothing
    quiet = RunProgress(False, stream=pipe)
    quiet.started(2, cluster.Workers("processes", 2))
    quiet.finished(False, "r", "bad")
    quiet.close()
    assert pipe.getvalue() == ""


def test_plan_reports_a_lost_simulated_run(monkeypatch):
    monkeypatch.setattr(cluster, "dask_available", lambda: False)
    lat = Lattice.from_spec("square", a=1.2, repeat=0.7, sites_per_repeat=3)
    monkeypatch.setattr("probeseq.study.plan._one", lambda job: (_ for _ in ()).throw(RuntimeError("no memory")))
    with pytest.raises(ProbeseqError, match=r"simulated run \d+ of 6 .* gave no result: .*no memory"):
        plan_experiment(("Co", "Zn"), lat, n_per_pattern=1, n_per_persistence=1, persistences=(0.3,),
                        top_radius_nm=4.0, depth_nm=12.0, n_boot=20, workers=1)
