"""One name per concept: the renamed options work, their old names still work with one note,
``--help`` shows only the new names, and errors name the new option."""

import json
import re
from types import SimpleNamespace

import pytest

import probeseq.outputs.export
import probeseq.study.plan
from probeseq.cli.common import RENAMED_OPTIONS
from probeseq.cli.main import main

# (command, old name, new name, value given, where the value arrives, value expected there)
SIMULATE = [
    ("--eta", "--detection-efficiency", "0.7", "eta", 0.7),
    ("--sigma-xy", "--lateral-blur", "0.13", "sigma_xy_nm", 0.13),
    ("--sigma-z", "--depth-blur", "0.05", "sigma_z_nm", 0.05),
    ("--top-radius", "--tip-radius", "3.5", "top_radius_nm", 3.5),
    ("--packing", "--lattice", "square", "packing", "square"),
]
PLAN = [
    ("--efficiency", "--detection-efficiency", "0.7", "efficiency", 0.7),
    ("--lateral-resolution", "--lateral-blur", "0.2", "lateral_resolution_nm", 0.2),
    ("--radius", "--tip-radius", "4", "top_radius_nm", 4.0),
]
EXPORT = [("--depth", "--depth-window", "5:15", "depth_nm", (5.0, 15.0))]


def _named(text: str, name: str) -> bool:
    """Whether option ``name`` appears in ``text`` as a whole option (not as a prefix of another)."""
    return re.search(rf"(?<![\w-]){re.escape(name)}(?![\w-])", text) is not None


def _notes(err: str) -> list:
    return [ln for ln in err.splitlines() if ln.startswith("note:")]


def test_the_tables_of_renames_agree():
    table = {(c, o, n) for c, rows in RENAMED_OPTIONS.items() for o, n in rows}
    tested = {("simulate", o, n) for o, n, *_ in SIMULATE} | {("plan", o, n) for o, n, *_ in PLAN} | \
             {("export", o, n) for o, n, *_ in EXPORT}
    assert table == tested


# ---------------------------------------------------------------------- simulate
def _simulate(tmp_path, capsys, flag, value):
    out = tmp_path / f"s{flag.strip('-')}.csv"
    size = [] if flag in ("--tip-radius", "--top-radius") else ["--tip-radius", "3"]
    code = main(["simulate", str(out), "--depth", "6", "-q", *size, flag, value])
    err = capsys.readouterr().err
    config = json.loads(out.with_suffix(".truth.json").read_text())["config"] if code == 0 else None
    return code, err, config


@pytest.mark.parametrize("old,new,value,key,want", SIMULATE)
def test_simulate_new_name_works_without_a_note(old, new, value, key, want, tmp_path, capsys):
    code, err, config = _simulate(tmp_path, capsys, new, value)
    assert code == 0, err
    assert config[key] == pytest.approx(want) if not isinstance(want, str) else config[key] == want
    assert _notes(err) == []


@pytest.mark.parametrize("old,new,value,key,want", SIMULATE)
def test_simulate_old_name_works_with_exactly_one_note(old, new, value, key, want, tmp_path, capsys):
    code, err, config = _simulate(tmp_path, capsys, old, value)
    assert code == 0, err
    assert config[key] == pytest.approx(want) if not isinstance(want, str) else config[key] == want
    assert err.strip().splitlines() == [f"note: {old} is deprecated; use {new}"]


# ---------------------------------------------------------------------- plan
class _Stop(Exception):
    pass


@pytest.fixture
def plan_calls(monkeypatch):
    calls = []

    def fake(metals, lattice, **kw):
        calls.append(kw)
        raise _Stop()

    monkeypatch.setattr(probeseq.study.plan, "plan_experiment", fake)
    monkeypatch.setenv("PROBESEQ_DEBUG", "1")  # let the sentinel through main()
    return calls


@pytest.mark.parametrize("use_old", [False, True])
@pytest.mark.parametrize("old,new,value,key,want", PLAN)
def test_plan_either_name_reaches_the_planner(old, new, value, key, want, use_old, plan_calls, capsys):
    with pytest.raises(_Stop):
        main(["plan", "--metals", "Co,Zn", "--lattice", "honeycomb", "--a", "2.6", "--repeat", "0.68", "-q",
              old if use_old else new, value])
    assert plan_calls[0][key] == pytest.approx(want)
    err = capsys.readouterr().err
    assert _notes(err) == ([f"note: {old} is deprecated; use {new}"] if use_old else [])
    assert len(err.strip().splitlines()) == int(use_old)


# ---------------------------------------------------------------------- export
@pytest.mark.parametrize("use_old", [False, True])
def test_export_either_depth_name_reaches_the_exporter(use_old, monkeypatch, tmp_path, capsys):
    calls = []
    monkeypatch.setattr(probeseq.outputs.export, "load_outdir", lambda d: SimpleNamespace(columns=SimpleNamespace(n_rods=9)))
    monkeypatch.setattr(probeseq.outputs.export, "export_outdir", lambda d, fmt, **kw: calls.append(kw) or tmp_path / "x")
    old, new, value, key, want = EXPORT[0]
    code = main(["export", str(tmp_path), "-q", old if use_old else new, value])
    err = capsys.readouterr().err
    assert code == 0, err
    assert tuple(calls[0][key]) == want
    assert err.strip().splitlines() == ([f"note: {old} is deprecated; use {new}"] if use_old else [])


# ---------------------------------------------------------------------- help and errors
@pytest.mark.parametrize("command", sorted(RENAMED_OPTIONS))
def test_help_lists_the_new_names_only(command, capsys):
    assert main([command, "--help"]) == 0
    text = capsys.readouterr().out
    for old, new in RENAMED_OPTIONS[command]:
        assert _named(text, new), new
        assert not _named(text, old), old


@pytest.mark.parametrize("args,new", [
    (["simulate", "{out}", "--detection-efficiency", "2"], "--detection-efficiency"),
    (["simulate", "{out}", "--eta", "2"], "--detection-efficiency"),
    (["simulate", "{out}", "--lateral-blur", "-1"], "--lateral-blur"),
    (["simulate", "{out}", "--depth-blur", "inf"], "--depth-blur"),
    (["simulate", "{out}", "--tip-radius", "0"], "--tip-radius"),
    (["simulate", "{out}", "--lattice", "hexagonal"], "--lattice"),
    (["plan", "--metals", "Co,Zn", "--lattice", "square", "--a", "1.2", "--repeat", "0.7", "--detection-efficiency",
      "0"], "--detection-efficiency"),
    (["plan", "--metals", "Co,Zn", "--lattice", "square", "--a", "1.2", "--repeat", "0.7", "--lateral-blur", "-1"],
     "--lateral-blur"),
    (["plan", "--metals", "Co,Zn", "--lattice", "square", "--a", "1.2", "--repeat", "0.7", "--tip-radius", "0"],
     "--tip-radius"),
    (["export", "{dir}", "--depth-window", "20:10"], "--depth-window"),
    (["export", "{dir}", "--depth", "5"], "--depth-window"),
])
def test_errors_name_the_new_option(args, new, tmp_path, capsys):
    args = [a.format(out=tmp_path / "s.csv", dir=tmp_path) for a in args]
    code = main(args)
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1
    errors = [ln for ln in err if ln.startswith("error:")]
    assert len(errors) == 1 and err[-1] == errors[0]
    assert _named(errors[0], new), errors[0]
    olds = [o for rows in RENAMED_OPTIONS.values() for o, n in rows if n == new]
    assert not any(_named(errors[0], o) for o in olds), errors[0]
    assert list(tmp_path.iterdir()) == []


def test_giving_both_names_is_an_error(tmp_path, capsys):
    code = main(["simulate", str(tmp_path / "s.csv"), "--eta", "0.5", "--detection-efficiency", "0.6"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1
    assert err[0] == "note: --eta is deprecated; use --detection-efficiency"
    assert len(err) == 2 and err[1].startswith("error: --detection-efficiency and --eta are the same option")
    assert list(tmp_path.iterdir()) == []


def test_root_help_lists_every_command_untruncated(capsys):
    import inspect

    from probeseq.cli.common import app

    assert main(["--help"]) == 0
    text = " ".join(capsys.readouterr().out.split())
    assert len(app.registered_commands) == 10
    for info in app.registered_commands:
        summary = " ".join(inspect.getdoc(info.callback).split("\n\n")[0].split())
        assert summary in text, summary
    assert "..." not in text.split("Commands:", 1)[1]


def test_analyze_help_mentions_batch_folders(capsys):
    assert main(["analyze", "--help"]) == 0
    text = " ".join(capsys.readouterr().out.split())
    assert "batch folder" in text and "OUT/<run folder name>" in text
