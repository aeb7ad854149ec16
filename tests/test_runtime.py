"""The runtime settings (probeseq.runtime): one ``n_jobs`` budget for kernel threads and worker
processes, set by ``--jobs`` on the command line or lazily with safe defaults; results do not
depend on it; importing probeseq changes nothing in the process."""

import json
import os
import subprocess
import sys
import threading

import numba
import numpy as np
import pytest

from probeseq import runtime
from probeseq.cli.main import main
from probeseq.exceptions import InputError
from probeseq.pipeline.options import AnalysisOptions
from probeseq.simulation.simulate import simulate_run
from probeseq.study.batch import analyze_batch

N_MAX = int(numba.config.NUMBA_NUM_THREADS)


@pytest.fixture
def restore_runtime():
    """Leave the process's runtime setting as the test found it."""
    before = runtime.jobs()
    yield
    runtime.configure(before)


def _in_thread(fn):
    out = {}
    t = threading.Thread(target=lambda: out.setdefault("v", fn()))
    t.start()
    t.join()
    return out["v"]


def _one_thread_count():
    runtime.ensure()  # what a kernel call does first
    return numba.get_num_threads()


def test_configure_sets_the_kernel_threads_and_restores(restore_runtime):
    runtime.configure(n_jobs=1)
    assert runtime.jobs() == 1
    assert numba.get_num_threads() == 1
    assert runtime.kernel_threads() == 1
    assert _in_thread(_one_thread_count) == 1  # numba's count is per thread: a kernel call applies it
    runtime.configure(None)
    assert runtime.jobs() is None
    assert numba.get_num_threads() == N_MAX
    assert _in_thread(_one_thread_count) == N_MAX
    runtime.configure(10 * N_MAX)  # more than the pool: the whole pool
    assert numba.get_num_threads() == N_MAX


def test_thread_count_reaches_the_decoder(restore_runtime, monkeypatch):
    from probeseq.decoding import rodchain

    seen = []
    kernel = rodchain._fit_kernel

    def spy(*args):
        seen.append(numba.get_num_threads())
        return kernel(*args)

    monkeypatch.setattr(rodchain, "_fit_kernel", spy)
    counts = np.zeros((2, 4, 2), np.float32)
    counts[:, :, 0] = 1
    mask = np.ones((2, 4), bool)
    rods, first, span = rodchain.spans(mask)
    args = (counts, mask, rods, first, span, 0.5, np.array([1.0, 1.0]), np.full((2, 2), 0.5), np.full(2, 0.5))
    runtime.configure(1)
    _in_thread(lambda: rodchain.fit_pass(*args))
    runtime.configure(None)
    _in_thread(lambda: rodchain.fit_pass(*args))
    assert seen == [1, N_MAX]


@pytest.mark.parametrize("bad", [0, -5, "x", 10 ** 9, True, 2.5, [2]])
def test_invalid_n_jobs_is_one_line_error(bad, restore_runtime):
    before = runtime.jobs()
    with pytest.raises(InputError) as e:
        runtime.configure(bad)
    msg = str(e.value)
    assert "\n" not in msg and "--jobs" in msg and str(runtime.MAX_JOBS) in msg
    assert runtime.jobs() == before  # a refused value changes nothing


def test_worker_counts_follow_n_jobs(restore_runtime):
    runtime.configure(None)
    assert runtime.worker_count(None, 2) == 2 and runtime.worker_count(3, 2) == 3
    assert runtime.worker_jobs(2) is None and runtime.pass_threads() is None
    runtime.configure(4)
    assert runtime.worker_count(None, 2) == 4 and runtime.worker_count(3, 2) == 3
    assert runtime.worker_jobs(2) == 2 and runtime.worker_jobs(8) == 1
    runtime.configure(1)
    assert runtime.pass_threads() == 1


def test_batch_takes_its_workers_from_n_jobs(tmp_path, restore_runtime):
    src = tmp_path / "runs"
    for name in ("a", "b"):
        (src / name).mkdir(parents=True)
        (src / name / "run.toml").write_text(f'[run]\nions = "{name}.h5"\nmetals = ["Co", "Zn"]\nlattice = "honeycomb"\n')
    workers = []
    for n_jobs in (1, None):
        runtime.configure(n_jobs)
        outcomes = analyze_batch(src, tmp_path / f"out{n_jobs}", options=AnalysisOptions(n_boot=20),
                                 started=lambda n_runs, where: workers.append(where.count))
        assert [o.ok for o in outcomes] == [False, False]  # the ion files do not exist
    assert workers == [1, min(2, os.cpu_count() or 1)]


def test_cli_jobs_reaches_the_runtime(tmp_path, capsys, restore_runtime):
    ions = tmp_path / "missing.csv"
    assert main(["--jobs", "1", "inspect", str(ions)]) == 1  # the command fails; the setting was made first
    assert runtime.jobs() == 1 and numba.get_num_threads() == 1
    assert main(["inspect", str(ions)]) == 1
    assert runtime.jobs() is None and numba.get_num_threads() == N_MAX
    capsys.readouterr()
    assert main(["--jobs", "0", "inspect", str(ions)]) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("error: --jobs")
    assert "--jobs N" in _help(capsys) and "worker processes for batches" in _help(capsys)


def _help(capsys):
    assert main(["--help"]) == 0
    return " ".join(capsys.readouterr().out.split())


@pytest.fixture(scope="module")
def tiny_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("tiny")
    paths = simulate_run(top_radius_nm=5, depth_nm=12, seed=3).write(root / "run.h5")
    return paths["ions"], paths["lattice"], root


def _analyze(tiny_run, jobs: str):
    h5, lattice, root = tiny_run
    out = root / f"out{jobs}"
    code = main(["--jobs", jobs, "analyze", str(h5), "--metals", "Co,Zn", "--lattice", str(lattice),
                 "--out", str(out), "-q", "--n-boot", "20"])
    assert code == 0
    assert runtime.jobs() == int(jobs)
    res = json.loads((out / "results.json").read_text())
    res.pop("timings_s", None)
    res.get("provenance", {}).pop("command_line", None)
    return res, (out / "tracks.csv").read_bytes(), (out / "runs.csv").read_bytes()


def test_results_do_not_depend_on_jobs(tiny_run, restore_runtime):
    one = _analyze(tiny_run, "1")
    two = _analyze(tiny_run, "2")
    assert one[1] == two[1] and one[2] == two[2]
    assert json.dumps(one[0], sort_keys=True) == json.dumps(two[0], sort_keys=True)


def _python(code: str, **env) -> str:
    e = {k: v for k, v in os.environ.items() if k != "NUMBA_THREADING_LAYER"}
    e.update(env)
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=e, timeout=300)
    assert r.returncode == 0, r.stderr
    return r.stdout.strip()


def test_import_changes_nothing_and_stays_light():
    out = _python("import os, sys, probeseq, probeseq.runtime\n"
                  "print('NUMBA_THREADING_LAYER' in os.environ, 'numba' in sys.modules, 'scipy' in sys.modules)")
    assert out == "False False False"


def test_the_fork_safe_layer_is_chosen_before_numba_starts_unless_the_user_chose_one():
    code = ("from probeseq import runtime\nruntime.configure(None)\nimport numba\n"
            "print(numba.config.THREADING_LAYER)")
    assert _python(code) == runtime.FORK_SAFE_LAYER
    assert _python(code, NUMBA_THREADING_LAYER="omp") == "omp"
    # numba imported first: set in numba's configuration instead
    assert _python("import numba\nfrom probeseq import runtime\nruntime.configure(2)\n"
                   "print(numba.config.THREADING_LAYER)") == runtime.FORK_SAFE_LAYER


def test_a_library_user_gets_the_fork_safe_layer_without_configuring():
    code = ("import numpy as np\nimport numba\nfrom probeseq.decoding import rodchain\n"
            "c = np.ones((3, 5, 2), np.float32); m = np.ones((3, 5), bool)\n"
            "r, f, s = rodchain.spans(m)\n"
            "rodchain.fit_pass(c, m, r, f, s, 0.5, np.ones(2), np.full((2, 2), 0.5), np.full(2, 0.5))\n"
            "print(numba.threading_layer(), numba.get_num_threads() == numba.config.NUMBA_NUM_THREADS)")
    assert _python(code) == f"{runtime.FORK_SAFE_LAYER} True"


def test_single_threaded_blas_limits_and_restores():
    threadpoolctl = pytest.importorskip("threadpoolctl")
    blas = [i for i in threadpoolctl.threadpool_info() if i["user_api"] == "blas"]
    if not blas:
        pytest.skip("no BLAS library found by threadpoolctl")
    before = [i["num_threads"] for i in blas]
    with runtime.single_threaded_blas():
        assert all(i["num_threads"] == 1 for i in threadpoolctl.threadpool_info() if i["user_api"] == "blas")
    after = [i["num_threads"] for i in threadpoolctl.threadpool_info() if i["user_api"] == "blas"]
    assert after == before


def test_preload_once_and_background_work(tmp_path):
    runtime.preload()
    assert runtime.preload() == 0.0
    target = tmp_path / "t.txt"
    job = runtime.Background(target.write_text, "written in the child")
    job.join("t.txt")
    assert target.read_text() == "written in the child"
    failing = runtime.Background(os._exit, 3)
    with pytest.raises(InputError, match=r"writing f failed \(exit code 3\)"):
        failing.join("f")
    out = {}
    runtime.background_checksum(lambda p: "ab12", "p", out)
    assert out["hex"] == "ab12"
    runtime.background_checksum(lambda p: open(p, "rb").read(), tmp_path / "missing", out)
    assert isinstance(out["hex"], InputError) and "\n" not in str(out["hex"])


def test_in_parts_covers_the_range_once_and_raises_a_part_error():
    from probeseq import runtime

    for n, threads, ppt, mi in ((10, 2, 1, 1), (100, 2, 4, 7), (5, 3, 4, 10), (0, 2, 1, 1), (7, 1, 4, 1)):
        seen = []
        runtime.in_parts(lambda lo, hi: seen.append((lo, hi)), n, threads, parts_per_thread=ppt, min_items=mi)
        seen.sort()
        assert seen[0][0] == 0 and seen[-1][1] == n  # consecutive parts covering range(n)
        assert all(a[1] == b[0] for a, b in zip(seen, seen[1:]))
        assert len(seen) <= max(1, threads * ppt)
        if threads > 1 and n // mi >= 2:
            assert len(seen) >= 2  # split, not one call

    def bad(lo, hi):
        if lo > 0:
            raise ValueError("part failed")

    with pytest.raises(ValueError, match="part failed"):
        runtime.in_parts(bad, 10, 2)


def test_in_parts_threads_are_kept_nested_calls_get_their_own_and_a_forked_child_makes_new_ones():
    """The parts run on one pool kept for the process (no new threads per call); a part that calls
    in_parts itself does not wait for threads its caller holds (a shared pool of two would
    deadlock here); a forked child, which inherits the pool but not its threads, still runs its
    parts."""
    import multiprocessing as mp
    import threading

    from probeseq import runtime

    names = set()
    runtime.in_parts(lambda lo, hi: names.add(threading.current_thread().name), 4, 2)
    runtime.in_parts(lambda lo, hi: names.add(threading.current_thread().name), 4, 2)
    assert len(names) <= 2 and all(n.startswith("probeseq-part") for n in names)

    got = []

    def outer(lo, hi):
        inner = []
        runtime.in_parts(lambda a, b: inner.append((a, b)), 6, 2)
        got.append(sorted(inner))

    done = threading.Event()
    t = threading.Thread(target=lambda: (runtime.in_parts(outer, 2, 2), done.set()), daemon=True)
    t.start()
    assert done.wait(20), "nested in_parts did not finish"
    assert got == [[(0, 3), (3, 6)]] * 2

    if "fork" not in mp.get_all_start_methods():
        return
    q = mp.get_context("fork").Queue()
    p = mp.get_context("fork").Process(target=_parts_in_child, args=(q,))
    p.start()
    p.join(20)
    assert p.exitcode == 0 and q.get(timeout=5) == [(0, 5), (5, 10)]


def _parts_in_child(q):
    from probeseq import runtime

    seen = []
    runtime.in_parts(lambda lo, hi: seen.append((lo, hi)), 10, 2)
    q.put(sorted(seen))
