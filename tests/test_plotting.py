"""Figures: sequence tracks, run lengths, rod-to-rod null, groups of rods.

The figures are checked by their content (sizes, tracks drawn, colours used, text present, vector
elements in the files), not only by the existence of a file.
"""

import re
from types import SimpleNamespace

import numpy as np
import pytest

from probeseq.decoding.decode import decode, sample_model
from probeseq.decoding.model import DecoderParams
from probeseq.exceptions import InputError
from probeseq.lattice.rodcolumns import RodColumns
from probeseq.outputs.figures import (
    CONFIDENCE_LEVELS,
    PRIOR_TOLERANCE,
    SIZE_PRESETS_MM,
    plot_group_variance,
    plot_rod_to_rod,
    plot_run_lengths,
    save_figure,
)
from probeseq.outputs.tracks import depth_window, parse_rod_ids, plot_tracks, select_rods, track_cells
from probeseq.pipeline.analysis import analyze
from probeseq.pipeline.options import AnalysisOptions
from probeseq.simulation.simulate import simulate_run
from probeseq.utils.palette import EMPTY, METAL_COLOURS, OTHER, UNRANGED, metal_colour

PALETTE_RGB = {tuple(round(int(h[i:i + 2], 16) / 255, 3) for i in (1, 3, 5))
               for h in METAL_COLOURS + (OTHER, UNRANGED, EMPTY)}
ALPHAS = {round(a, 3) for _, a in CONFIDENCE_LEVELS}


def _rgb(c):
    return tuple(round(float(v), 3) for v in c[:3])


def _collection(fig, gid):
    found = [c for c in fig.axes[0].collections if c.get_gid() == gid]
    assert len(found) == 1, gid
    return found[0]


def _rects(coll):
    """(n, 4, 2) corners of the rectangles of a collection of compound paths (4 corners + close each)."""
    if not coll.get_paths():
        return np.zeros((0, 4, 2))
    return np.concatenate([p.vertices.reshape(-1, 5, 2)[:, :4] for p in coll.get_paths()])


@pytest.fixture(scope="module")
def analysed():
    run = simulate_run(pattern="long-block", top_radius_nm=5, depth_nm=18, seed=21)
    return analyze(run.ions, ("Co", "Zn"), run.lattice, options=AnalysisOptions(n_boot=40))


@pytest.fixture(scope="module")
def grid():
    """12 rods x 60 sites drawn from the model itself, with rods 0-1 masked over sites 0-9."""
    params = DecoderParams.from_components(np.array([[0.9, 0.1], [0.1, 0.9]]), 0.5, 0.1, 0.02)
    counts, states = sample_model(params, 12, 60, random_state=4)
    mask = np.ones((12, 60), bool)
    mask[:2, :10] = False
    g = np.arange(12)
    xy = np.column_stack([(g % 4) * 1.5, (g // 4) * 1.5]).astype(float)
    nb = np.array([(i, j) for i in range(12) for j in range(i + 1, 12)
                   if np.isclose(np.hypot(*(xy[i] - xy[j])), 1.5)])
    cols = RodColumns(counts=counts, mask=mask, metals=("Co", "Zn"), rod_xy_nm=xy, tilt=np.zeros(2), z_ref_nm=0.0,
                      site_z_nm=np.arange(60) * 0.25, pitch_nm=0.25, neighbours=nb)
    return cols, decode(cols, params)


# ---------------------------------------------------------------------------------- tracks
@pytest.mark.parametrize("preset", ["one-column", "two-column"])
def test_tracks_width_matches_journal_preset(grid, preset):
    cols, dec = grid
    fig = plot_tracks(cols, dec, rods=[0, 1, 2], size=preset)
    # source: presets 85 mm / 178 mm, common journal column widths (common practice)
    assert fig.get_size_inches()[0] == pytest.approx(SIZE_PRESETS_MM[preset] / 25.4)
    fig2 = plot_tracks(cols, dec, size=(120, 60))
    assert fig2.get_size_inches() == pytest.approx((120 / 25.4, 60 / 25.4))


def test_tracks_draws_one_track_per_rod_asked(grid):
    cols, dec = grid
    fig = plot_tracks(cols, dec, rods=[7, 3, 5])
    assert len(_collection(fig, "track-outlines").get_paths()) == 3
    labels = [t.get_text() for t in fig.axes[0].get_yticklabels()]
    assert labels == ["rod 7", "rod 3", "rod 5"]
    rows = np.unique(np.round(_rects(_collection(fig, "track-cells"))[:, :, 1].mean(axis=1)))
    assert set(rows) == {0, 1, 2}
    fig = plot_tracks(cols, dec, sample=5, random_state=1)
    assert len(_collection(fig, "track-outlines").get_paths()) == 5


def test_tracks_colours_come_from_the_palette(grid):
    cols, dec = grid
    fig = plot_tracks(cols, dec, rods=range(12))
    cells = _collection(fig, "track-cells")
    faces = cells.get_facecolors()
    assert {_rgb(c) for c in faces} <= PALETTE_RGB
    assert {round(float(c[3]), 3) for c in faces} <= ALPHAS
    decoded_metals = set(np.unique(dec.viterbi[dec.mask]))
    assert {_rgb(c) for c in faces} >= {_rgb(tuple(int(metal_colour(k)[i:i + 2], 16) / 255 for i in (1, 3, 5)))
                                        for k in decoded_metals}
    # every other filled artist (legend swatches included) also uses palette colours
    legend = fig.legends[0]
    for h in legend.legend_handles:
        fc = h.get_facecolor()
        if fc[3] > 0:
            assert _rgb(fc) in PALETTE_RGB


def test_tracks_text_present(grid):
    cols, dec = grid
    fig = plot_tracks(cols, dec, rods=[0, 4])
    ax = fig.axes[0]
    legend_text = [t.get_text() for t in fig.legends[0].get_texts()]
    for must in ("Co", "Zn", "no ion, p \u2248 prior", "masked (outside volume)", "p \u2265 0.95"):
        assert must in legend_text
    assert ax.get_xlabel() == "depth z (nm)"
    texts = [t.get_text() for a in fig.axes for t in a.texts]
    assert any(re.fullmatch(r"\d+(\.\d+)? nm", t) for t in texts)  # the scale bar
    top_labels = [a.get_xlabel() for a in ax.child_axes]
    assert "site" in top_labels


def test_track_cells_codes_follow_posterior_mask_and_empty_sites():
    # hand-made decoding of 1 rod x 6 sites, 2 metals, prior (0.5, 0.5)
    counts = np.zeros((1, 6, 2))
    counts[0, [0, 1, 2], 0] = 1.0
    post = np.array([[[0.99, 0.01], [0.9, 0.1], [0.7, 0.3], [0.52, 0.48], [0.2, 0.8], [0.0, 0.0]]])
    vit = np.array([[0, 0, 0, 0, 1, -1]])
    mask = np.array([[True] * 5 + [False]])
    cols = RodColumns(counts=counts, mask=mask, metals=("Co", "Zn"), rod_xy_nm=np.zeros((1, 2)), tilt=np.zeros(2),
                      z_ref_nm=0.0, site_z_nm=np.arange(6) * 0.2, pitch_nm=0.2)
    dec = SimpleNamespace(viterbi=vit, posteriors=post, mask=mask, stationary=np.array([0.5, 0.5]))
    code = track_cells(cols, dec, [0])
    n_lv = len(CONFIDENCE_LEVELS)
    # site 0: Co, p 0.99 -> level 0; site 1: p 0.9 -> level 1; site 2: p 0.7 -> level 2 (ions seen)
    # site 3: no ion, |p - prior| = 0.02 < PRIOR_TOLERANCE -> blank; site 4: no ion but p(Zn) 0.8,
    # 0.3 from the prior -> Zn level 1; site 5: masked
    assert PRIOR_TOLERANCE < 0.3
    assert code[0].tolist() == [0, 1, 2, -1, 1 * n_lv + 1, -2]
    # the colour is the site call (largest posterior, as tracks.csv's state), not the Viterbi path
    dec_path_co = SimpleNamespace(viterbi=np.array([[0, 0, 0, 0, 0, -1]]), posteriors=post, mask=mask,
                                  stationary=np.array([0.5, 0.5]))
    assert track_cells(cols, dec_path_co, [0])[0].tolist() == [0, 1, 2, -1, 1 * n_lv + 1, -2]


def test_merged_cells_cover_exactly_the_coloured_sites(grid):
    cols, dec = grid
    ids = np.arange(12)
    fig = plot_tracks(cols, dec, rods=ids, size="two-column")
    code = track_cells(cols, dec, ids)
    rects = _rects(_collection(fig, "track-cells"))
    widths = rects[:, 2, 0] - rects[:, 0, 0]
    assert widths.sum() == pytest.approx((code >= 0).sum() * cols.pitch_nm)
    # merging: one rectangle per run of equal code, far fewer than sites
    runs = sum(1 + int(np.count_nonzero(np.diff(r[r >= 0]) != 0)) for r in code)
    assert len(rects) >= runs and len(rects) < (code >= 0).sum()
    masked = _rects(_collection(fig, "track-masked"))
    assert (masked[:, 2, 0] - masked[:, 0, 0]).sum() == pytest.approx((code == -2).sum() * cols.pitch_nm)
    assert _collection(fig, "track-masked").get_hatch() == "////"


def test_depth_window_limits_what_is_drawn(grid):
    cols, dec = grid
    fig = plot_tracks(cols, dec, rods=[2, 3], depth_nm=(3.0, 6.0))
    r = _rects(_collection(fig, "track-cells"))
    pitch = cols.pitch_nm
    assert r[:, :, 0].min() >= 3.0 - pitch and r[:, :, 0].max() <= 6.0 + pitch
    s, inside = depth_window(cols, (3.0, 6.0))
    z = cols.site_z_nm[s]
    assert z.min() >= 3.0 and z.max() <= 6.0 and inside.all()


def test_vector_and_raster_files(grid, tmp_path):
    cols, dec = grid
    fig = plot_tracks(cols, dec, rods=[0, 3], size="one-column")
    svg = tmp_path / "t.svg"
    pdf = tmp_path / "t.pdf"
    png = tmp_path / "t.png"
    save_figure(fig, svg)
    save_figure(fig, pdf)
    save_figure(fig, png, dpi=100)
    s = svg.read_text()
    assert "<path" in s and "<image" not in s
    assert re.search(r"<text[^>]*>rod 3</text>", s)  # svg.fonttype 'none': text kept as text
    assert 'id="track-cells"' in s
    b = pdf.read_bytes()
    assert b"/FontFile2" in b  # TrueType embedded (pdf.fonttype 42)
    assert b"/Subtype /Image" not in b
    from PIL import Image

    with Image.open(png) as im:
        w, h = im.size
        colours = set(im.convert("RGB").getdata())
    assert w == int(fig.get_size_inches()[0] * 100)
    assert h == int(fig.get_size_inches()[1] * 100)
    assert (0x00, 0x72, 0xB2) in colours and (0xD5, 0x5E, 0x00) in colours
    # plot_tracks(path=...) writes by suffix
    plot_tracks(cols, dec, tmp_path / "u.pdf", rods=[1])
    assert (tmp_path / "u.pdf").read_bytes().startswith(b"%PDF")


def test_figures_do_not_touch_pyplot(grid):
    import matplotlib.pyplot as plt

    cols, dec = grid
    before = plt.get_fignums()
    plot_tracks(cols, dec, rods=[0])
    assert plt.get_fignums() == before


# ---------------------------------------------------------------------------------- selection
def test_select_by_region_neighbours_and_ids(grid):
    cols, dec = grid
    xy = cols.rod_xy_nm
    ids, _ = select_rods(cols, region=(-0.1, 1.6, -0.1, 1.6))
    assert set(ids) == {0, 1, 4, 5}
    ids, _ = select_rods(cols, region=(1.5, 1.5, 0.1))
    assert set(ids) == set(np.flatnonzero(np.hypot(xy[:, 0] - 1.5, xy[:, 1] - 1.5) <= 0.1))
    ids, centre = select_rods(cols, neighbours_of=5)
    assert centre == 5 and ids[0] == 5
    assert set(ids[1:]) == {1, 4, 6, 9}
    ids, _ = select_rods(cols, rods="2,4-6")
    assert ids.tolist() == [2, 4, 5, 6]
    assert parse_rod_ids("1-3,7").tolist() == [1, 2, 3, 7]
    a, _ = select_rods(cols, sample=4, random_state=3)
    b, _ = select_rods(cols, sample=4, random_state=3)
    assert a.tolist() == b.tolist() and len(set(a)) == 4
    fig = plot_tracks(cols, dec, neighbours_of=5)
    assert [t.get_text() for t in fig.axes[0].get_yticklabels()][0] == "rod 5 (centre)"


def test_default_selection_is_a_compact_patch(analysed):
    cols = analysed.columns
    ids, _ = select_rods(cols)
    assert len(ids) == 24
    # consecutive tracks are lateral neighbours most of the time
    d = np.hypot(*(cols.rod_xy_nm[ids[1:]] - cols.rod_xy_nm[ids[:-1]]).T)
    nn = analysed.lattice.nearest_rod_distance_nm
    assert np.median(d) < 1.5 * nn


# ---------------------------------------------------------------------------------- bad input
def test_bad_input_messages(grid, tmp_path):
    cols, dec = grid
    with pytest.raises(InputError, match=r"unknown rod id\(s\) 12, 40; this run has rods 0\.\.11"):
        plot_tracks(cols, dec, rods=[1, 12, 40])
    with pytest.raises(InputError, match=r"holds no site; sites span 0\.00\.\.14\.75 nm"):
        plot_tracks(cols, dec, depth_nm=(100, 120))
    with pytest.raises(InputError, match=r"start < end"):
        plot_tracks(cols, dec, depth_nm=(5, 2))
    with pytest.raises(InputError, match=r"neighbours_of: unknown rod id\(s\) 99"):
        plot_tracks(cols, dec, neighbours_of=99)
    with pytest.raises(InputError, match="one way only"):
        plot_tracks(cols, dec, rods=[1], sample=3)
    with pytest.raises(InputError, match="holds no rod axis"):
        plot_tracks(cols, dec, region=(100, 101, 100, 101))
    with pytest.raises(InputError, match="expected a suffix among"):
        plot_tracks(cols, dec, tmp_path / "t.jpg", rods=[1])
    with pytest.raises(InputError, match="unknown preset"):
        plot_tracks(cols, dec, size="three-column")
    with pytest.raises(InputError, match="do not match"):
        plot_tracks(cols, SimpleNamespace(viterbi=dec.viterbi[:3], posteriors=dec.posteriors, mask=dec.mask,
                                          stationary=dec.stationary))
    for msg in (str(e) for e in _errors(cols, dec)):
        assert "\n" not in msg


def _errors(cols, dec):
    out = []
    for kw in ({"rods": [99]}, {"depth_nm": (50, 60)}):
        try:
            plot_tracks(cols, dec, **kw)
        except InputError as e:
            out.append(e)
    assert len(out) == 2
    return out


# ---------------------------------------------------------------------------------- other figures
def test_run_lengths_figure(analysed):
    st = analysed.statistics
    fig = plot_run_lengths(st)
    assert fig.get_size_inches()[0] == pytest.approx(178 / 25.4)
    assert len(fig.axes) == len(st.metals)
    for k, (ax, m) in enumerate(zip(fig.axes, st.metals)):
        assert ax.get_title().startswith(f"{m}: {st.run_lengths[m]['n_runs']} runs")
        assert ax.get_yscale() == "log"
        labels = [t.get_text() for t in ax.get_legend().get_texts()]
        assert labels == ["decoded runs", "fitted chain", "independent sites"]
        lines = {ln.get_label(): ln for ln in ax.lines}
        # the chain line is P_kk^l with the fitted transition matrix
        x, y = lines["fitted chain"].get_data()
        assert np.allclose(y, st.transmat[k, k] ** np.asarray(x))
        x, y = lines["independent sites"].get_data()
        assert np.allclose(y, st.composition[k] ** np.asarray(x))
        from matplotlib.colors import to_rgb

        assert _rgb(to_rgb(lines["decoded runs"].get_color())) == _rgb(to_rgb(metal_colour(k)))
        assert _rgb(to_rgb(lines["independent sites"].get_color())) == _rgb(to_rgb(OTHER))


def test_rod_to_rod_figure(analysed):
    st = analysed.statistics
    rr = st.rod_to_rod
    fig = plot_rod_to_rod(st, copy_threshold=0.3)
    top, bottom = fig.axes[:2]
    heights = [p.get_height() for p in top.patches]
    assert sum(heights) == np.isfinite(rr.null).sum()
    vlines = [ln for ln in top.lines if np.ptp(ln.get_xdata()) == 0]
    assert len(vlines) == 1 and vlines[0].get_xdata()[0] == pytest.approx(rr.statistic)
    assert f"p = {rr.p_value:.3g}" in top.get_title()
    x, y = bottom.lines[0].get_data()
    assert np.allclose(x, rr.lags) and np.allclose(y, rr.corr_lags)
    legend_text = [t.get_text() for t in fig.legends[0].get_texts()]
    assert "copy threshold 0.3" in legend_text
    with pytest.raises(InputError, match="no rod-to-rod agreement"):
        plot_rod_to_rod(SimpleNamespace(rod_to_rod=None, metals=("Co", "Zn")))


def test_group_variance_figure(analysed):
    from probeseq.decoding.groups import analyze_groups

    g = analyze_groups(analysed.columns, random_state=0)
    fig = plot_group_variance(g)
    ax = fig.axes[0]
    assert ax.get_xscale() == "log" and ax.get_yscale() == "log"
    lines = {ln.get_label(): ln for ln in ax.lines}
    x, y = lines["independent rods (1/n)"].get_data()
    assert np.allclose(x, g.group_sizes) and np.allclose(y, g.variance_independent)
    x, y = lines["measured (noise-corrected)"].get_data()
    assert np.allclose(y, g.variance[g.variance > 0])
    fit = [k for k in lines if k.startswith("fit")]
    assert fit and f"{g.rho:.2f}" in fit[0]
    assert ax.get_xlabel() == "rods per group n"
    with pytest.raises(InputError, match="no groups-of-rods result"):
        plot_group_variance(None)


# ---------------------------------------------------------------------------------- text without mathtext
def test_ions_and_powers_of_ten_are_plain_unicode_text():
    from probeseq.utils.textformat import _plain_tick, typeset_ion

    assert typeset_ion("C2H2", 1) == "C\u2082H\u2082\u207a"
    assert typeset_ion("Zn", 2) == "Zn\u00b2\u207a"
    assert typeset_ion("H2O", 1) == "H\u2082O\u207a"
    assert _plain_tick(r"$\mathdefault{10^{-3}}$") == "10\u207b\u00b3"
    assert _plain_tick(r"$\mathdefault{2\times10^{1}}$") == "2\u00d710\u00b9"
    assert _plain_tick(r"$\mathdefault{10^{0}}$") == "10\u2070"
    assert _plain_tick("") == "" and _plain_tick("0.5") == "0.5"


def test_log_axes_and_spectrum_labels_need_no_mathtext(analysed, monkeypatch, tmp_path):
    # every mathtext string costs ~13 ms to parse per format and size: the figures use none
    import matplotlib.mathtext

    from probeseq.ranging.plot import plot_ranging

    def refuse(self, s, *a, **k):
        raise AssertionError(f"mathtext parsed: {s!r}")

    monkeypatch.setattr(matplotlib.mathtext.MathTextParser, "parse", refuse)
    fig = plot_run_lengths(analysed.statistics)
    fig.savefig(tmp_path / "runs.png", dpi=50)
    ticks = [t.get_text() for ax in fig.axes for t in ax.get_yticklabels()]
    assert any(t.startswith("10") and t != "10" for t in ticks), ticks
    plot_ranging(analysed.ranging, tmp_path / "spectrum")
    assert (tmp_path / "spectrum.png").stat().st_size > 0
