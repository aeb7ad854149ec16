"""The self-contained HTML report: content, escaping, embedding, and the page as a real browser renders it."""

import dataclasses
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from probeseq.exceptions import InputError
from probeseq.outputs.report import CAUTIONS, FIGURE_IDS, SECTION_IDS, report_html, write_report
from probeseq.pipeline.analysis import analyze
from probeseq.pipeline.options import AnalysisOptions
from probeseq.simulation.simulate import simulate_run


@pytest.fixture(scope="module")
def run():
    return simulate_run(pattern="long-block", top_radius_nm=5, depth_nm=18, seed=21)


@pytest.fixture(scope="module")
def result(run):
    return analyze(run.ions, ("Co", "Zn"), run.lattice, options=AnalysisOptions(n_boot=40),
                   provenance={"command_line": "probeseq analyze run/ --out out/"})


@pytest.fixture(scope="module")
def report(result, run, tmp_path_factory):
    path = tmp_path_factory.mktemp("report") / "report.html"
    write_report(result, path, ions=run.ions)
    return path


def _section(doc, sid):
    m = re.search(rf'<section id="{sid}">(.*?)</section>', doc, re.S)
    assert m, sid
    return m.group(1)


def test_sections_in_order_verdict_first(report, result):
    doc = report.read_text(encoding="utf-8")
    pos = [doc.index(f'<section id="{s}">') for s in SECTION_IDS]
    assert pos == sorted(pos)
    verdict = _section(doc, "verdict")
    cl = result.classification
    assert f'<p class="label">{cl.label}</p>' in verdict
    assert f"{100 * cl.confidence:.0f} %" in verdict
    assert cl.along_rod in verdict and cl.rod_to_rod in verdict
    for reason in cl.reasons:
        assert reason.replace("'", "&#x27;").replace("<", "&lt;").replace(">", "&gt;") in verdict


def test_self_contained_no_network(report):
    doc = report.read_text(encoding="utf-8")
    srcs = re.findall(r'\bsrc="([^"]*)"', doc)
    assert srcs and all(s.startswith("data:image/") for s in srcs)
    hrefs = re.findall(r'\bhref="([^"]*)"', doc)
    assert all(h.startswith("#") for h in hrefs)
    assert "<link" not in doc and "@import" not in doc and "url(" not in doc
    import html

    csp = re.search(r'http-equiv="Content-Security-Policy" content="([^"]*)"', doc)
    assert csp and "default-src 'none'" in html.unescape(csp.group(1))


def test_figures_embedded(report):
    doc = report.read_text(encoding="utf-8")
    fig = _section(doc, "figures")
    for name in ("tracks", "spectrum", "density", "run_lengths", "rod_to_rod"):
        assert f'<figure id="{FIGURE_IDS[name]}">' in fig
    assert f'id="{FIGURE_IDS["groups"]}"' not in fig  # resolvable rods: no groups analysis
    import base64
    import io

    from PIL import Image

    for uri in re.findall(r'src="data:image/png;base64,([^"]+)"', fig):
        with Image.open(io.BytesIO(base64.b64decode(uri))) as im:
            assert im.size[0] > 300 and im.size[1] > 150


def test_statistics_table_holds_estimates_and_intervals(report, result):
    doc = report.read_text(encoding="utf-8")
    sec = _section(doc, "statistics")
    from probeseq.outputs.report import _fmt

    for name in ("composition.Co", "mean_run_length_sites.Zn", "persistence", "entropy_rate_bits"):
        est, lo, hi = result.statistics.interval(name)
        row = re.search(rf"<tr>(?:(?!</tr>).)*<td>{re.escape(name)}</td></tr>", sec, re.S)
        assert row, name
        cells = re.findall(r"<td[^>]*>([^<]*)</td>", row.group(0))
        assert cells[1:4] == [_fmt(est), _fmt(lo), _fmt(hi)]
        assert lo <= est <= hi


def test_parameters_warnings_cautions_provenance(report, result, run):
    doc = report.read_text(encoding="utf-8")
    par = _section(doc, "parameters")
    from probeseq.outputs.report import _fmt

    assert _fmt(result.decoded.eta) in par
    reg = result.columns.params["registration"]
    assert _fmt(reg["rotation_deg"]) in par and "\u00b1" in par
    a = result.decoded.transmat
    assert _fmt(a[0, 0]) in par and _fmt(a[1, 1]) in par
    assert "No warnings" in _section(doc, "warnings")
    cau = _section(doc, "cautions")
    for title, _ in CAUTIONS:
        assert title in cau
    assert "first-order Markov chain" in cau and "detection efficiency" in cau and "other methods" in cau
    prov = _section(doc, "provenance")
    assert "probeseq analyze run/ --out out/" in prov
    assert result.provenance["version"] in prov
    assert "n_boot" in prov and ">40<" in prov


def test_text_is_escaped_and_warnings_listed(result):
    bait = "<script>alert('x')</script> & more"
    cols = dataclasses.replace(result.columns, resolvable=False, misassigned_fraction=0.4)
    bad = dataclasses.replace(result, warnings=(bait,), columns=cols,
                              provenance={**result.provenance, "command_line": "probeseq <b>x</b>"})
    doc = report_html(bad, figures={k: None for k in FIGURE_IDS})
    assert bait not in doc and "<b>x</b>" not in doc
    assert "&lt;script&gt;alert(&#x27;x&#x27;)&lt;/script&gt; &amp; more" in _section(doc, "warnings")
    # the report lists the result's one warnings list (which analyze fills) and adds none of its own
    assert re.findall(r"<li>(.*?)</li>", _section(doc, "warnings")) == [
        "&lt;script&gt;alert(&#x27;x&#x27;)&lt;/script&gt; &amp; more"]
    assert "not resolvable" in _section(doc, "verdict")
    assert doc.count("<script>") == 1  # only the report's own check script
    assert "<img" not in doc


def test_figures_argument_replaces_adds_and_drops(result, tmp_path):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from probeseq.decoding.groups import analyze_groups

    extra = Figure(figsize=(4, 3))
    FigureCanvasAgg(extra)
    extra.add_subplot(1, 1, 1).plot([0, 1], [1, 0])
    png = tmp_path / "x.png"
    extra.savefig(png)
    with_groups = dataclasses.replace(result, groups=analyze_groups(result.columns, random_state=0))
    doc = report_html(with_groups, figures={"tracks": None, "spectrum": None, "rod_to_rod": None, "overlaps": None,
                                            "reconstruction": None,
                                            "run_lengths": png, "comparison": (extra, "Runs compared", "caption")})
    fig = _section(doc, "figures")
    assert 'id="fig-tracks"' not in fig and 'id="fig-spectrum"' not in fig
    assert 'id="fig-groups"' in fig and 'id="fig-comparison"' in fig and "Runs compared" in fig
    assert fig.count("<img") == 3  # run lengths (from the file), groups, comparison
    assert "Groups of rods" in _section(doc, "parameters")
    (tmp_path / "x.jpg").write_text("x")
    with pytest.raises(InputError, match="expected a .png or .svg file"):
        report_html(result, figures={k: None for k in FIGURE_IDS} | {"tracks": tmp_path / "x.jpg"})
    with pytest.raises(InputError, match="expected an AnalysisResult"):
        write_report(object(), tmp_path / "r.html")


# ---------------------------------------------------------------------------------- browser
def _chromium():
    for name in ("chromium", "chromium-browser"):
        p = shutil.which(name)
        if p:
            return p
    return "/usr/bin/chromium" if Path("/usr/bin/chromium").is_file() else None


CHROMIUM_FLAGS = ["--headless=new", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                  "--disable-background-networking", "--disable-component-update", "--disable-sync",
                  "--enable-logging=stderr", "--v=0", "--virtual-time-budget=3000", "--hide-scrollbars"]


def _run_chromium(exe, profile, *args):
    cmd = [exe, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=90)


def _page_errors(stderr: str) -> list:
    """Console messages and uncaught errors of the page (the report logs nothing when all is well)."""
    return [ln for ln in stderr.splitlines() if ":CONSOLE" in ln or "Uncaught" in ln
            or "Content Security Policy" in ln]


def test_report_renders_in_headless_chromium(report, tmp_path):
    exe = _chromium()
    if exe is None:
        pytest.skip("no chromium binary found (Debian package 'chromium'); the rendered-page test needs it")
    url = report.resolve().as_uri()
    dom = _run_chromium(exe, tmp_path / "profile-dom", "--dump-dom", url)
    assert dom.returncode == 0, dom.stderr[-2000:]
    body = re.search(r"<body([^>]*)>", dom.stdout)
    assert body, dom.stdout[:500]
    attrs = dict(re.findall(r'data-([a-z]+)="([^"]*)"', body.group(1)))
    expected = attrs["expect"].split(",")
    assert set(SECTION_IDS) <= set(expected) and "fig-tracks" in expected
    assert attrs.get("visible", "").split(",") == expected, attrs  # every key element laid out, non-zero size
    assert attrs.get("hidden") == ""
    n_img = report.read_text(encoding="utf-8").count("<img")
    assert attrs.get("images") == f"{n_img}/{n_img}"  # every embedded figure decoded
    assert attrs.get("errors") == ""
    assert _page_errors(dom.stderr) == []

    shot = tmp_path / "shot.png"
    res = _run_chromium(exe, tmp_path / "profile-shot", f"--screenshot={shot}", "--window-size=1280,3000", url)
    assert res.returncode == 0 and shot.is_file(), res.stderr[-2000:]
    assert _page_errors(res.stderr) == []
    from PIL import Image

    with Image.open(shot) as im:
        assert im.size == (1280, 3000)
        rgb = np.asarray(im.convert("RGB"))
    colours = {tuple(c) for c in rgb[::4, ::4].reshape(-1, 3)}
    assert len(colours) > 50  # not blank
    # the tracks figure is on the first 3000 px: both metal colours of the palette are on screen
    for hexc in ("#0072B2", "#D55E00"):
        target = np.array([int(hexc[i:i + 2], 16) for i in (1, 3, 5)])
        assert (np.abs(rgb.astype(int) - target).sum(axis=2) < 12).sum() > 500, hexc
    # the verdict box (accent border) is near the top
    accent = np.array([0x00, 0x72, 0xB2])
    rows = np.flatnonzero((np.abs(rgb.astype(int) - accent).sum(axis=2) < 12).any(axis=1))
    assert rows.min() < 300
