"""What a new user meets on the command line, in exports and in the tracks figure (issue 22).

Each test fails on the behaviour a tester reported: exports of runs with more than 400 rods that
stopped, a tracks figure that did not say which rods it shows, a grey legend under tinted tracks,
every other row labelled, output folders that failed only after the work, the README's own export
example, unreadable help, metal symbols checked only after the ions were read, and a quick start
that left its output where git would offer to track it.
"""

import fnmatch
import re
import shlex
from pathlib import Path

import numpy as np
import pytest

import probeseq.outputs.export
import probeseq.study.plan
from probeseq.cli.main import main
from probeseq.decoding.decode import decode, sample_model
from probeseq.decoding.model import DecoderParams
from probeseq.exceptions import InputError
from probeseq.lattice.rodcolumns import RodColumns
from probeseq.outputs.export import OutputFolder
from probeseq.outputs.figures import CONFIDENCE_LEVELS, _rgba
from probeseq.outputs.folder import check_outdir, check_outfile
from probeseq.outputs.trackrods import DEFAULT_TRACKS, MAX_TRACKS, choose_rods
from probeseq.outputs.tracks import label_font_pt, plot_tracks, track_cells
from probeseq.pipeline.stages import range_file
from probeseq.utils.palette import metal_colour

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_data" / "rodnet7-batch-150C"


def _rods_grid(n_rods, n_sites, seed=4):
    """Columns and decoding of ``n_rods`` rods on a square grid (1.5 nm apart), drawn from the model."""
    params = DecoderParams.from_components(np.array([[0.9, 0.1], [0.1, 0.9]]), 0.5, 0.1, 0.02)
    counts, _ = sample_model(params, n_rods, n_sites, random_state=seed)
    side = int(np.ceil(np.sqrt(n_rods)))
    g = np.arange(n_rods)
    xy = np.column_stack([(g % side) * 1.5, (g // side) * 1.5]).astype(float)
    mask = np.ones((n_rods, n_sites), bool)
    mask[:3, :5] = False
    cols = RodColumns(counts=counts, mask=mask, metals=("Co", "Zn"), rod_xy_nm=xy, tilt=np.zeros(2), z_ref_nm=0.0,
                      site_z_nm=np.arange(n_sites) * 0.25, pitch_nm=0.25)
    return cols, decode(cols, params)


def _nearest_median(xy, n):
    d = ((xy - np.median(xy, axis=0)) ** 2).sum(1)
    return set(np.argsort(d, kind="stable")[:n].tolist())


def _one_error(capsys):
    err = [ln for ln in capsys.readouterr().err.strip().splitlines() if ln.strip()]
    assert len(err) == 1 and err[0].startswith("error:") and "internal error" not in err[0], err
    return err[0]


@pytest.fixture(scope="module")
def many_rods():
    return _rods_grid(450, 30)


@pytest.fixture(scope="module")
def sample_outdir(tmp_path_factory):
    """The sample run analysed once (the same folder as the export test of test_cli_stages)."""
    d = tmp_path_factory.getbasetemp() / "exportfig"
    if not (d / "results.json").exists():
        assert main(["analyze", str(SAMPLE), "--out", str(d), "--n-boot", "30", "-q", "--force"]) == 0
    return d


# ---------------------------------------------------------------------- 1. export of many rods
def test_default_figure_export_of_more_than_400_rods_works_and_says_which(many_rods, monkeypatch, tmp_path, capsys):
    cols, dec = many_rods
    monkeypatch.setattr(probeseq.outputs.export, "load_outdir",
                        lambda d: OutputFolder(Path(d), {"schema_version": 1}, cols, dec))
    code = main(["export", str(tmp_path), "--format", "svg"])
    cap = capsys.readouterr()
    assert code == 0, cap.err
    assert f"the {MAX_TRACKS} of the 450 rods with decoded sites nearest the centre" in cap.out
    assert "--max-rods 400" in cap.out
    svg = (tmp_path / "exports" / "tracks.svg").read_text()
    text = " ".join(re.sub(r"<[^>]+>", " ", svg).split())
    assert f"the {MAX_TRACKS} of the 450 rods" in text  # the caption
    shown = {int(v) for v in re.findall(r"rod (\d+)", text)}
    assert shown == _nearest_median(cols.rod_xy_nm, MAX_TRACKS)


def test_max_rods_option_chooses_and_bad_values_are_one_line(many_rods, monkeypatch, tmp_path, capsys):
    cols, dec = many_rods
    monkeypatch.setattr(probeseq.outputs.export, "load_outdir",
                        lambda d: OutputFolder(Path(d), {"schema_version": 1}, cols, dec))
    out = tmp_path / "t.png"
    assert main(["export", str(tmp_path), "--format", "png", "--max-rods", "30", "--out", str(out)]) == 0
    assert "the 30 of the 450 rods" in capsys.readouterr().out and out.read_bytes()[:4] == b"\x89PNG"
    for bad in ("0", "401"):
        assert main(["export", str(tmp_path), "--format", "svg", "--max-rods", bad, "--out", str(tmp_path / "u.svg")]) == 1
        assert "--max-rods" in _one_error(capsys)
    assert not (tmp_path / "u.svg").exists()


# ---------------------------------------------------------------------- 2. the tracks figure
def test_tracks_caption_states_the_rule_and_the_rods_follow_it():
    cols, dec = _rods_grid(100, 20)
    fig = plot_tracks(cols, dec, size="two-column")
    caption = [t for t in fig.texts if t.get_gid() == "track-caption"]
    assert len(caption) == 1
    text = " ".join(caption[0].get_text().split())
    assert f"the {DEFAULT_TRACKS} of the 100 rods with decoded sites nearest the centre of the field of view" in text
    assert "lateral neighbours are adjacent tracks" in text
    shown = {int(t.get_text().split()[1]) for t in fig.axes[0].get_yticklabels()}
    assert shown == _nearest_median(cols.rod_xy_nm, DEFAULT_TRACKS)
    # a choice larger than the figure holds is cut by the same stated rule instead of failing
    c = choose_rods(cols, rods=list(range(100)), max_rods=10)
    assert set(c.ids.tolist()) == _nearest_median(cols.rod_xy_nm, 10) and "10 of 100 rods" in c.rule


def test_legend_swatches_are_the_tints_the_tracks_use():
    from matplotlib.patches import Rectangle

    cols, dec = _rods_grid(12, 40)
    fig = plot_tracks(cols, dec)
    legend = fig.legends[0]
    faces = {tuple(np.round(r.get_facecolor(), 3)) for r in legend.findobj(Rectangle) if r.get_facecolor()[3] > 0}
    for _low, alpha in CONFIDENCE_LEVELS:
        for k in range(cols.n_metals):
            assert tuple(np.round(_rgba(metal_colour(k), alpha), 3)) in faces, (k, alpha)
    greys = {f for f in faces if f[:3] == f[1:] + f[:1] and f[3] < 1}  # r == g == b, see-through: a grey swatch
    assert greys == set()


def test_every_track_is_labelled_in_a_large_figure():
    cols, dec = _rods_grid(300, 20)
    fig = plot_tracks(cols, dec, rods=range(300), size="two-column", raster=False)
    fig.canvas.draw()  # the layout engine places the axes when the figure is drawn
    ax = fig.axes[0]
    labels = ax.get_yticklabels()
    assert [t.get_text() for t in labels] == [f"rod {i}" for i in range(300)]
    lo, hi = sorted(ax.get_ylim())
    track_in = ax.get_position().height * fig.get_size_inches()[1] / (hi - lo)
    size = labels[0].get_fontsize()
    assert size * 1.2 / 72.0 <= track_in * 1.001  # a label fits its track
    assert size == pytest.approx(label_font_pt(8.0, track_in), rel=0.05)


def test_large_figures_draw_the_tracks_as_one_image_matching_the_cells(tmp_path):
    cols, dec = _rods_grid(300, 200)
    fig = plot_tracks(cols, dec, tmp_path / "t.svg", rods=range(300), size="two-column")
    images = [im for im in fig.axes[0].images if im.get_gid() == "track-image"]
    assert len(images) == 1 and not [c for c in fig.axes[0].collections if c.get_gid() == "track-cells"]
    svg = (tmp_path / "t.svg").read_text()
    assert svg.count("<image") == 1
    plot_tracks(cols, dec, tmp_path / "v.svg", rods=range(300), size="two-column", raster=False)
    assert (tmp_path / "t.svg").stat().st_size < (tmp_path / "v.svg").stat().st_size / 3
    # each site's pixel has the colour of its cell (no depth offsets here: site k of every rod at the same depth)
    img = np.asarray(images[0].get_array())
    x0, x1 = images[0].get_extent()[:2]
    code = track_cells(cols, dec, np.arange(300))
    n_lv = len(CONFIDENCE_LEVELS)
    px = ((cols.site_z_nm - x0) / (x1 - x0) * img.shape[1]).astype(int)
    for r in (0, 1, 57, 299):
        for k in range(cols.n_sites):
            want = (np.round(255 * np.array(_rgba(metal_colour(code[r, k] // n_lv), CONFIDENCE_LEVELS[code[r, k] % n_lv][1])))
                    if code[r, k] >= 0 else np.zeros(4))
            assert np.array_equal(img[r, px[k]], want), (r, k, code[r, k])
    # a PNG is drawn from paths (faster there), the same figure otherwise
    fig = plot_tracks(cols, dec, tmp_path / "t.png", rods=range(300), size="two-column")
    assert not fig.axes[0].images


# ---------------------------------------------------------------------- 3. output folders
def test_outputs_under_a_file_are_refused_before_any_work(tmp_path, monkeypatch, capsys):
    blocker = tmp_path / "afile"
    blocker.write_text("not a folder")
    with pytest.raises(InputError, match="afile is a file, not a folder"):
        check_outfile(blocker / "sub" / "plan.json")
    with pytest.raises(InputError, match="afile is a file, not a folder"):
        check_outdir(blocker / "sub" / "out")

    def never(*a, **k):
        raise AssertionError("the simulations started although the output cannot be written")

    monkeypatch.setattr(probeseq.study.plan, "plan_experiment", never)
    code = main(["plan", "--metals", "Co,Zn", "--lattice", "square", "--a", "1.2", "--repeat", "0.7", "-q",
                 "--out", str(blocker / "sub" / "plan.json")])
    assert code == 1 and "is a file, not a folder" in _one_error(capsys)
    assert blocker.read_text() == "not a folder"


def test_missing_output_folders_are_made(tmp_path, capsys):
    out = tmp_path / "new" / "deeper" / "ranges.toml"
    assert main(["range", str(SAMPLE / "ions.h5"), "--metals", "Co,Zn", "--out", str(out), "-q"]) == 0, \
        capsys.readouterr().err
    assert out.read_text().count("[[range]]") > 2


# ---------------------------------------------------------------------- 4. the README's export example
def test_readme_export_example_works_on_the_sample_run(sample_outdir, tmp_path, capsys):
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    quick = readme.split("## Quick start", 1)[1].split("## ", 1)[0]
    analyse = next(ln for ln in quick.splitlines() if "probeseq analyze" in ln)
    folder = shlex.split(analyse.split("probeseq analyze", 1)[1])
    outdir = folder[folder.index("--out") + 1]
    example = next(ln for ln in quick.splitlines() if ln.startswith("probeseq export"))
    args = [str(sample_outdir) if a == outdir else a for a in shlex.split(example)[1:]]
    out = tmp_path / "example.svg"
    code = main(args + ["--out", str(out)])
    cap = capsys.readouterr()
    assert code == 0, cap.err
    rods = args[args.index("--rods") + 1]
    assert f"rods {rods}" in cap.out and out.read_text().count("<svg") == 1


def test_empty_selections_say_what_exists_and_reversed_ranges_are_named(sample_outdir, tmp_path, capsys):
    out = str(tmp_path / "x.svg")
    assert main(["export", str(sample_outdir), "--format", "svg", "--rods", "3,5,10-12", "--depth-window", "10:20",
                 "--out", out]) == 1
    line = _one_error(capsys)
    assert re.search(r"rods 3, 5, 10-12 have decoded sites at [\d.]+ to [\d.]+ nm", line), line
    assert re.search(r"rods with decoded sites in 10:20 nm: \d", line) and re.search(r"rods 0-\d+ exist", line)
    assert main(["export", str(sample_outdir), "--format", "csv", "--rods", "10-5", "--out", str(tmp_path / "x.csv")]) == 1
    assert _one_error(capsys) == "error: --rods: rod range 10-5 is reversed; did you mean 5-10?"
    cols, dec = _rods_grid(12, 10)
    with pytest.raises(InputError, match="rod range 10-5 is reversed; did you mean 5-10"):
        plot_tracks(cols, dec, rods="10-5")


# ---------------------------------------------------------------------- 5. help and metals
COMMANDS = ("simulate", "inspect", "range", "columns", "decode", "analyze", "compare", "plan", "export",
            "prepare")


@pytest.mark.parametrize("command", COMMANDS)
def test_help_names_arguments_and_values_readably(command, capsys):
    assert main([command, "--help"]) == 0
    text = capsys.readouterr().out
    usage = text.split("\n\n", 1)[0]
    assert "{" not in usage and "}" not in usage, usage
    assert not re.search(r"<(str|float|int|path)>", text)
    if "--length-unit" in text:
        flat = " ".join(text.split())
        assert re.search(r"--length-unit UNIT .*?\[default: \(?nm", flat)


def test_usage_line_shows_the_argument_name(capsys):
    assert main(["analyze", "--help"]) == 0
    assert capsys.readouterr().out.startswith("Usage: probeseq analyze [OPTIONS] IONS\n")
    assert main(["compare", "--help"]) == 0
    assert "compare [OPTIONS] OUTDIRS..." in capsys.readouterr().out


def test_metals_are_checked_before_the_ion_file_is_read(tmp_path, capsys):
    missing = str(tmp_path / "no_such_ions.h5")
    assert main(["range", missing, "--metals", "co,zn", "--out", str(tmp_path / "r.toml")]) == 1
    line = _one_error(capsys)
    assert "did you mean Co,Zn?" in line and "formula" not in line
    assert main(["analyze", missing, "--metals", "Co,Xx", "--lattice", "honeycomb", "--a", "2.6", "--repeat", "0.68",
                 "--out", str(tmp_path / "a")]) == 1
    line = _one_error(capsys)
    assert "'Xx'" in line and "no_such_ions" not in line
    with pytest.raises(InputError, match="did you mean Co,Zn"):
        range_file(missing, ("CO", "zn"))
    assert list(tmp_path.iterdir()) == []


# ---------------------------------------------------------------------- 6. the quick start's output
def test_quick_start_writes_where_git_ignores():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    quick = readme.split("## Quick start", 1)[1].split("## ", 1)[0]
    analyse = shlex.split(next(ln for ln in quick.splitlines() if "probeseq analyze" in ln).split("&&")[-1])
    top = Path(analyse[analyse.index("--out") + 1]).parts[0]
    patterns = [ln.strip() for ln in (ROOT / ".gitignore").read_text().splitlines()
                if ln.strip() and not ln.startswith("#")]
    folder_rules = [p.strip("/") for p in patterns if p.startswith("/") and p.endswith("/")]
    assert any(fnmatch.fnmatch(top, p) for p in folder_rules), (top, folder_rules)
    # the default outputs of the stage commands, written at the top of the repository, are ignored too
    for name, rule_kind in (("ranges.toml", "file"), ("columns_out", "folder"), ("decode_out", "folder")):
        rules = folder_rules if rule_kind == "folder" else [p.lstrip("/") for p in patterns]
        assert any(fnmatch.fnmatch(name, p) for p in rules), name

