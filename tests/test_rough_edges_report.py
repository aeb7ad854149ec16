"""What a new user meets in the report, the terminal, results.json, the figures and `compare` (issue 22).

Each test names the rough edge it guards against; every one failed before the fix it covers.
One small simulated analysis (random arrangement, about half of the sites without an ion, marked
synthetic in its run description) is written once as an `analyze` output folder and read by the
tests of the report, results.json, the terminal summary and the rendered page.
"""

import csv
import html
import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from probeseq.pipeline.analysis import analyze, write_analysis
from probeseq.pipeline.options import AnalysisOptions
from probeseq.simulation.simulate import simulate_run

CHECK_OUTPUTS = Path(__file__).resolve().parents[2] / "shared" / "examples" / "check_outputs.py"


@pytest.fixture(scope="module")
def tiny():
    """A random run with eta 0.5: about half the sites hold no ion, so over 25 % are uncertain."""
    return simulate_run(pattern="random", top_radius_nm=4.0, depth_nm=15, seed=5)


@pytest.fixture(scope="module")
def result(tiny):
    return analyze(tiny.ions, ("Co", "Zn"), tiny.lattice, options=AnalysisOptions(n_boot=40),
                   provenance={"sample": {"name": "tiny-random", "synthetic": True, "synthesis_temperature_c": 90},
                               "command_line": "probeseq analyze tiny/ --out out/"})


@pytest.fixture(scope="module")
def outdir(result, tmp_path_factory):
    return write_analysis(result, tmp_path_factory.mktemp("rough") / "out")


def _section(doc, sid):
    m = re.search(rf'<section id="{sid}">(.*?)</section>', doc, re.S)
    assert m, sid
    return m.group(1)


def _items(fragment):
    return [html.unescape(x) for x in re.findall(r"<li>(.*?)</li>", fragment, re.S)]


# ---------------------------------------------------------------------------------- 1: one warnings list
def test_warnings_are_one_list_in_terminal_results_and_report(result, outdir):
    from probeseq.study.batch import summary_lines

    warns = list(result.warnings)
    # the uncertain-share warning used to exist only in the report
    assert any("% of decoded sites are uncertain" in w for w in warns), warns
    share = float(result.decoded.uncertain.sum()) / result.decoded.n_obs
    assert share > 0.25 and f"{100 * share:.0f} % of decoded sites are uncertain" in " ".join(warns)
    res = json.loads((outdir / "results.json").read_text())
    assert res["warnings"] == warns
    doc = (outdir / "report.html").read_text(encoding="utf-8")
    assert _items(_section(doc, "warnings")) == warns
    terminal = [ln[len("warning: "):] for ln in summary_lines(result) if ln.startswith("warning: ")]
    assert terminal == warns


def test_a_figure_not_drawn_is_a_warning_in_results_json_and_report(result, tmp_path, monkeypatch):
    import probeseq.outputs.figures as figures
    from probeseq.exceptions import DataQualityWarning

    def broken(*a, **k):
        raise ValueError("no axes left")

    monkeypatch.setattr(figures, "plot_run_lengths", broken)
    with pytest.warns(DataQualityWarning, match="run_lengths"):
        out = write_analysis(result, tmp_path / "out")
    res = json.loads((out / "results.json").read_text())
    doc = (out / "report.html").read_text(encoding="utf-8")
    failed = [w for w in res["warnings"] if w.startswith("figure 'run_lengths' not drawn")]
    assert failed and failed[0] in _items(_section(doc, "warnings"))
    assert _items(_section(doc, "warnings")) == res["warnings"]


# ---------------------------------------------------------------------------------- 3: mean run lengths
def test_one_headline_run_length_defined_and_the_decoded_mean_named(result, outdir):
    res = json.loads((outdir / "results.json").read_text())
    st, dec = res["statistics"], res["decoding"]
    defs = st["definitions"]
    assert "headline" in defs["mean_run_length_sites"] and "1 / (1 - P_kk)" in defs["mean_run_length_sites"]
    assert "runs.csv" in dec["mean_decoded_run_length_definition"]
    a = np.asarray(st["transmat"], float)
    with open(outdir / "runs.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    for k, m in enumerate(result.metals):
        # the headline is the fitted chain's 1 / (1 - P_kk) ...
        assert st["mean_run_length_sites"][m] == pytest.approx(1 / (1 - a[k, k]), rel=1e-9)
        # ... and the decoding's number is the mean of the runs listed in runs.csv
        lengths = [int(r["length_sites"]) for r in rows if r["metal"] == m]
        assert dec["mean_decoded_run_length_sites"][m] == pytest.approx(np.mean(lengths), rel=1e-9)
    note = re.search(r'<p class="muted" id="run-length-definition">(.*?)</p>',
                     (outdir / "report.html").read_text(encoding="utf-8"), re.S)
    assert note and "headline" in note.group(1) and "runs.csv" in note.group(1)
    m0 = result.metals[0]
    assert f"{m0} {dec['mean_decoded_run_length_sites'][m0]:.1f}" in note.group(1)


def test_shared_output_checker_still_passes(outdir):
    if not CHECK_OUTPUTS.is_file():
        pytest.skip("the shared output checker is not beside this repository")
    done = subprocess.run([sys.executable, str(CHECK_OUTPUTS), str(outdir), "--metals", "Co,Zn"],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0 and done.stdout.startswith("layout: ok"), done.stdout + done.stderr


# ---------------------------------------------------------------------------------- 4: the report's text
def test_p_values_read_the_same_in_reasons_and_tables():
    from probeseq.outputs.report import _fmt_p
    from probeseq.statistics.classify import _p_eq

    # analytic p-values: the reasons once said "< 1e-16" where the tables said "< 1e-300"
    for p in (0.0, 1e-320, 3.2e-20, 4.5e-4, 0.031):
        assert _p_eq(p).lstrip("= ") == _fmt_p(p)
    assert _fmt_p(0.0) == "< 1e-300" and _fmt_p(3.2e-20) == "3.2e-20"
    # a permutation p at the floor of 199 null draws is a bound, at the test's resolution
    assert _p_eq(1 / 200, 199) == "\u2264 0.005" == _fmt_p(1 / 200, 199)
    assert _fmt_p(0.14, 199) == "0.140"


def test_report_p_values_have_no_interval_and_reasons_use_the_same_text(result, outdir):
    doc = (outdir / "report.html").read_text(encoding="utf-8")
    st = _section(doc, "statistics")
    for name in ("rod_to_rod.p_value", "runs_test.p"):
        if name not in result.statistics.estimates:
            continue
        row = re.search(rf"<tr>(?:(?!</tr>).)*<td>{re.escape(name)}</td></tr>", st, re.S)
        cells = [html.unescape(c) for c in re.findall(r"<td[^>]*>([^<]*)</td>", row.group(0))]
        assert cells[2] == cells[3] == "\u2013", cells  # no interval for a p-value
    from probeseq.outputs.report import _fmt_p

    rr = result.statistics.rod_to_rod
    n = int(np.isfinite(rr.null).sum())
    reason = [r for r in result.classification.reasons if "circularly shifted" in r][0]
    assert f"p {_fmt_p(rr.p_value, n)}".replace("p 0", "p = 0") in reason


def test_em_iterations_are_reported_truthfully(result, outdir):
    from probeseq.decoding.decode import decode
    from probeseq.outputs.reporttext import em_iterations_text

    dec = result.decoded
    assert dec.n_iter_screening >= 1 and dec.n_obs_screening == dec.n_obs  # a small run screens on every site
    par = html.unescape(_section((outdir / "report.html").read_text(encoding="utf-8"), "parameters"))
    total = dec.n_iter_screening + dec.n_iter
    assert f"EM iterations</td><td class=\"num\">{total} in all: {dec.n_iter_screening} screening" in par
    assert "1 (yes)" not in par
    given = decode(result.columns, dec.params)
    assert em_iterations_text(given) == "parameters given, not fitted"


def test_platform_filled_and_captions_say_what_is_shown(outdir):
    doc = (outdir / "report.html").read_text(encoding="utf-8")
    prov = html.unescape(_section(doc, "provenance"))
    row = re.search(r"<td>python, platform</td><td>([^<]*)</td>", prov)
    assert row and not row.group(1).rstrip().endswith(",") and len(row.group(1).split(", ")[1]) > 2
    caps = re.findall(r"<figcaption><b>(.*?)</b>(.*?)</figcaption>", _section(doc, "figures"), re.S)
    names = [t for t, _ in caps]
    assert "Sequence tracks." in names and "Mass spectrum with ranges." in names  # were "Tracks.", "Spectrum."
    for title, body in caps:
        assert len(body.split()) >= 25, (title, body)  # what is shown and how to read it


def test_synthetic_input_says_so_in_report_and_terminal(result, outdir):
    from probeseq.outputs.reporttext import synthetic_note
    from probeseq.study.batch import summary_lines

    doc = (outdir / "report.html").read_text(encoding="utf-8")
    banner = re.search(r'<p class="alert" id="synthetic-note">(.*?)</p>', doc, re.S)
    assert banner and doc.index('id="synthetic-note"') < doc.index('<p class="label">')  # above the verdict
    assert "synthetic-note" in re.search(r'data-expect="([^"]*)"', doc).group(1)  # checked on screen
    assert any("synthetic data" in ln for ln in summary_lines(result))
    assert synthetic_note({"sample": {"synthetic": False}}) is None and synthetic_note({}) is None
    sample = Path(__file__).resolve().parents[1] / "sample_data" / "rodnet7-batch-150C" / "run.toml"
    import tomllib

    assert tomllib.loads(sample.read_text())["sample"]["synthetic"] is True  # the bundled runs are marked


def test_the_two_compositions_are_labelled(result, outdir):
    st = html.unescape(_section((outdir / "report.html").read_text(encoding="utf-8"), "statistics"))
    assert "from the mass spectrum" in st and "on the rod sites" in st
    spec = result.ranging.to_dict()["composition"]["Co"]["fraction"]
    from probeseq.outputs.report import _fmt

    row = re.search(r"<tr><td>Co</td>(.*?)</tr>", st, re.S)
    assert row and _fmt(spec) in row.group(1)


# ---------------------------------------------------------------------------------- 2: compare
def _record(name, temperature, mu, rng):
    from probeseq.study.compare import RunRecord

    reps, ivs = {}, {}
    for s, m in (("persistence", mu), ("mean_run_length_sites.Co", 5 + 10 * mu), ("composition.Co", 0.4),
                 ("entropy_rate_bits", 1 - mu), ("rod_to_rod.corr", -0.015)):
        r = rng.normal(m, 0.004 + 0.01 * abs(m), 200)
        reps[s] = r
        ivs[s] = {"estimate": m, "low": float(np.percentile(r, 2.5)), "high": float(np.percentile(r, 97.5))}
    md = {"name": name} | ({} if temperature is None else {"synthesis_temperature_c": temperature})
    return RunRecord(folder=Path("/nowhere"), name=name, metals=("Co",), metadata=md, label="random",
                     confidence=0.9, intervals=ivs, replicates=reps)


def test_compare_figure_orders_runs_without_a_value_last_and_reads_well(rng):
    import matplotlib.pyplot as plt

    from probeseq.study.compare import compare_runs, comparison_figure, field_label

    long = "rodnet7-batch-150C-a-very-long-descriptive-name-of-the-specimen"
    recs = [_record(long, 150, 0.9, rng), _record("b-090", 90, 0.5, rng), _record("c-none", None, 0.7, rng),
            _record("d-120", 120, 0.6, rng), _record("e-none", None, 0.2, rng)]
    comp = compare_runs(recs)
    assert [r.name for r in comp.runs] == ["b-090", "d-120", long, "c-none", "e-none"]
    assert field_label("synthesis_temperature_c") == "synthesis temperature (\u00b0C)"
    fig = comparison_figure(comp)
    try:
        axes = [a for a in fig.axes if a.get_title()]
        assert axes
        for ax in axes:
            title = ax.get_title()
            assert "_" not in title and "." not in title, title  # not a raw key like "rod to rod.corr"
            assert ax.get_ylabel().strip(), title  # every panel says what its y axis is
            assert ax.get_xlabel() == "synthesis temperature (\u00b0C)"
            joined = [ln for ln in ax.get_lines() if ln.get_linestyle() == "-" and len(ln.get_xdata()) > 1]
            for ln in joined:  # lines join only runs with a value, in the order of that value
                xd = np.asarray(ln.get_xdata(), float)
                assert np.all(np.diff(xd) > 0) and xd.max() <= 150 + 10
            xs = [float(np.ravel(ln.get_xdata())[0]) for ln in ax.get_lines()
                  if ln.get_linestyle() in ("None", "") and ln.get_marker() == "s"]
            if xs:  # runs without a value sit to the right of every run with one ("placed last")
                assert min(xs) > 150
        key = "\n".join(t.get_text() for t in fig.texts)
        assert long in key.replace("\n      ", "")  # the full name is in the key, however long
    finally:
        plt.close(fig)


def test_compare_prints_p_at_the_test_resolution_and_intervals_readably(rng):
    from probeseq.study.compare import compare_runs

    comp = compare_runs([_record("a", 90, 0.2, rng), _record("b", 150, 0.9, rng)])
    d = [x for x in comp.differences if x["statistic"] == "persistence"][0]
    assert d["n_resamples"] == 200 and d["p_value"] == pytest.approx(2 / 201)
    assert d["p_value_text"] == "\u2264 0.01"  # not "0.00995"
    assert re.fullmatch(r"-\S+ to -\S+", d["interval_text"]), d["interval_text"]
    text = "\n".join(comp.text_lines())
    assert "\u2264 0.01" in text and not re.search(r"\d-\d", text.replace("e-", "e"))  # no "[-0.02--0.01]"
    assert "0.00995" not in text


# ---------------------------------------------------------------------------------- 5: figures
def _crowded_spectrum():
    from probeseq.ranging.ranges import Range, RangeSet
    from probeseq.ranging.spectrum import histogram

    rng = np.random.default_rng(3)
    peaks = [1.008] + list(np.arange(26.0, 35.5, 0.75))
    mz = np.concatenate([rng.normal(p, 0.02, int(3000 / (1 + i % 3))) for i, p in enumerate(peaks)]
                        + [rng.uniform(0.6, 100, 2000)])
    rs = [Range(p - 0.1, p + 0.1, "H" if p < 2 else ("Zn" if i % 2 else "C2H2"), 1 if p < 2 or i % 2 == 0 else 2)
          for i, p in enumerate(peaks)]
    # a 100 Da axis as in a real run: 0.75 Da apart, the rotated labels are wider than their spacing
    return histogram(mz[mz > 0.5], range_da=(0.5, 100)), RangeSet(tuple(rs), metals=("Co", "Zn"))


def test_spectrum_labels_do_not_overlap_and_clear_the_axis():
    from probeseq.ranging.plot import plot_spectrum

    spec, ranges = _crowded_spectrum()
    fig = plot_spectrum(spec, ranges, ("Co", "Zn"))
    rend = fig.canvas.get_renderer()
    ax = fig.axes[0]
    box = ax.get_window_extent(rend)
    labels = [t for t in ax.texts if t.get_rotation() == 90]
    assert len(labels) >= 8
    bbs = [t.get_window_extent(rend) for t in labels]
    for i in range(len(bbs)):
        assert bbs[i].x0 >= box.x0 + 1 and bbs[i].x1 < box.x1 and bbs[i].y1 <= box.y1 + 0.5  # the first clears the axis
        for j in range(i):
            assert not bbs[i].overlaps(bbs[j]), (labels[i].get_text(), labels[j].get_text())
    if len(labels) < len(ranges):  # labels left out are said to be left out
        assert any("not labelled" in t.get_text() for t in ax.get_legend().get_texts())


def test_other_species_bands_are_visible():
    from matplotlib.colors import to_rgba

    from probeseq.ranging.plot import plot_spectrum
    from probeseq.utils.palette import OTHER

    spec, ranges = _crowded_spectrum()
    ax = plot_spectrum(spec, ranges, ("Co", "Zn")).axes[0]
    grey = to_rgba(OTHER)[:3]
    bands = [p for p in ax.patches if tuple(np.round(p.get_facecolor()[:3], 3)) == tuple(np.round(grey, 3))]
    assert bands
    for p in bands:
        assert p.get_facecolor()[3] >= 0.5 and p.get_linewidth() > 0  # was a pale fill at 0.35 with no edge


def test_density_figure_explains_z_ref_units_and_marks_only_decoded_rods(result, tiny, tmp_path, monkeypatch):
    import dataclasses

    import matplotlib.pyplot as plt

    from probeseq.lattice.plot import decoded_rods, plot_rod_density

    cols = result.columns
    counts = np.array(cols.counts, copy=True)
    empty = int(np.flatnonzero(cols.mask.any(1))[0])
    counts[empty] = 0  # a rod in the volume without a single ion
    emptied = dataclasses.replace(cols, counts=counts)
    used = decoded_rods(emptied)
    assert not used[empty] and used.sum() == int(cols.mask.any(1).sum()) - 1
    kept = []
    from matplotlib.figure import Figure

    real_savefig = Figure.savefig

    def keep(self, *a, **k):  # the figure as it is saved (drawn without pyplot)
        kept.append(self)
        return real_savefig(self, *a, **k)

    monkeypatch.setattr(Figure, "savefig", keep)
    x, y, z = tiny.ions.x, tiny.ions.y, tiny.ions.z
    figs_before = plt.get_fignums()
    plot_rod_density(x, y, z, emptied, tmp_path / "d.png")
    assert plt.get_fignums() == figs_before
    fig = kept[-1]
    ax = fig.axes[0]
    assert f"z_ref = {emptied.z_ref_nm:.1f} nm" in ax.get_xlabel() and "along the rods" in ax.get_xlabel()
    cbar = fig.axes[1].get_ylabel()
    assert "nm\u00b2" in cbar  # an area density, not "per 0.1 nm bin"
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert f"rod axis, decoded ({int(used.sum())})" in legend and any("not decoded" in t for t in legend)
    monkeypatch.undo()


# ---------------------------------------------------------------------------------- 6: rendered page
def _chromium():
    for name in ("chromium", "chromium-browser", "google-chrome"):
        p = shutil.which(name)
        if p:
            return p
    return None


def test_analysis_report_renders_and_every_image_loads(outdir, tmp_path):
    """The report.html of an `analyze` folder in headless Chromium: every <img> decoded
    (naturalWidth > 0, checked by the page's own script after load), every key element laid out,
    no script error, and a screenshot that is not blank."""
    exe = _chromium()
    if exe is None:
        pytest.skip("no Chromium found (.ci/run installs Debian's 'chromium'); the rendered-page test needs it")
    flags = ["--headless=new", "--no-sandbox", "--disable-gpu", "--no-first-run", "--disable-background-networking",
             "--disable-component-update", "--disable-sync", "--virtual-time-budget=5000", "--hide-scrollbars"]
    url = (outdir / "report.html").resolve().as_uri()
    dom = subprocess.run([exe, *flags, f"--user-data-dir={tmp_path / 'p1'}", "--dump-dom", url],
                         capture_output=True, text=True, timeout=120)
    assert dom.returncode == 0, dom.stderr[-2000:]
    body = re.search(r"<body([^>]*)>", dom.stdout)
    attrs = dict(re.findall(r'data-([a-z]+)="([^"]*)"', body.group(1)))
    n_img = (outdir / "report.html").read_text(encoding="utf-8").count("<img")
    assert n_img >= 6
    assert attrs.get("images") == f"{n_img}/{n_img}", attrs  # every figure, the files of figures/ too, decoded
    assert attrs.get("hidden") == "" and "synthetic-note" in attrs.get("visible", "").split(",")
    assert attrs.get("errors") == ""
    shot = tmp_path / "shot.png"
    res = subprocess.run([exe, *flags, f"--user-data-dir={tmp_path / 'p2'}", f"--screenshot={shot}",
                          "--window-size=1280,2400", url], capture_output=True, text=True, timeout=120)
    assert res.returncode == 0 and shot.is_file(), res.stderr[-2000:]
    from PIL import Image

    with Image.open(shot) as im:
        rgb = np.asarray(im.convert("RGB"))
    assert rgb.shape[:2] == (2400, 1280) and len({tuple(c) for c in rgb[::6, ::6].reshape(-1, 3)}) > 50
