"""The report of an analysis: one self-contained HTML file.

:func:`write_report` writes ``report.html`` for an :class:`~probeseq.pipeline.options.AnalysisResult`:
the verdict and its reasons first (after a "Synthetic data" banner when the run description marks
the input as simulated), then the statistics with their 95 % bootstrap intervals, the figures, the
fitted parameters, the warnings (``result.warnings``: the same list as the terminal and
``results.json``), the cautions and the provenance. The words (captions, warnings, cautions) are
written in :mod:`probeseq.outputs.reporttext`; p-values are printed at their test's resolution
(:func:`probeseq.utils.textformat.format_p`). Everything the
page needs is inside the file: figures are embedded as base64 PNG, the style sheet and a small
script are inline, and a Content-Security-Policy forbids any network request, so the report opens
the same offline, from an e-mail attachment or years later. All text is HTML-escaped.

The inline script only checks, once the page has loaded, that the key sections have a non-zero
size on screen and that every figure decoded; it records the result on ``<body>``
(``data-visible``, ``data-hidden``, ``data-images``, ``data-errors``) for automated checks of the
rendered page.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import io
import json
import math
import os
import tempfile
from pathlib import Path

import numpy as np

from .._version import __version__
from ..exceptions import InputError
from ..utils.textformat import format_interval, format_p
from .reporttext import CAUTIONS, FEW_RODS_WARN, UNCERTAIN_SHARE_WARN, em_iterations_text, figure_text, run_length_note  # noqa: F401
from .reporttext import CONFIDENCE_MEANING as _CONFIDENCE_MEANING
from .reporttext import LABEL_MEANING as _LABEL_MEANING
from .reporttext import synthetic_note

__all__ = ['write_report', 'report_html', 'SECTION_IDS', 'FIGURE_IDS', 'CAUTIONS', 'UNCERTAIN_SHARE_WARN', 'FEW_RODS_WARN']

#: ids of the report's main sections, in page order
SECTION_IDS = ("verdict", "statistics", "figures", "parameters", "warnings", "cautions", "provenance")


#: figure name -> element id of its <figure>
FIGURE_IDS = {"tracks": "fig-tracks", "spectrum": "fig-spectrum", "density": "fig-density",
              "run_lengths": "fig-run-lengths", "rod_to_rod": "fig-rod-to-rod", "groups": "fig-groups", "overlaps": "fig-overlaps",
              "reconstruction": "fig-reconstruction"}


#: resolution of the embedded figures, dots per inch
FIGURE_DPI = 120


#: figures are shown at this many CSS pixels per inch of figure width (1.25 x the CSS inch)
DISPLAY_PX_PER_IN = 120


#: figures narrower than this (inches; one journal column) are drawn and shown this much larger
NARROW_IN = 4.5


NARROW_ZOOM = 1.6


_STYLE = """
:root{--ink:#1b1b1b;--muted:#555;--line:#d0d0d0;--soft:#f4f4f4;--accent:#0072B2;--warn:#D55E00}
*{box-sizing:border-box}
body{margin:0;font-family:system-ui,-apple-system,"Segoe UI",Roboto,"DejaVu Sans",Arial,sans-serif;
 color:var(--ink);background:#fff;line-height:1.45;font-size:15px}
main{max-width:1120px;margin:0 auto;padding:18px 22px 60px}
header h1{font-size:1.5em;margin:0.2em 0}
header p{margin:0.2em 0;color:var(--muted)}
nav{margin:10px 0 4px;font-size:0.92em}
nav a{color:var(--accent);margin-right:14px;text-decoration:none}
section{margin-top:28px;border-top:1px solid var(--line);padding-top:6px}
h2{font-size:1.22em;margin:0.4em 0 0.5em}
h3{font-size:1.02em;margin:1.1em 0 0.4em}
#verdict{border:2px solid var(--accent);border-radius:6px;padding:10px 18px 12px;background:#f5f9fc}
.label{font-size:2em;font-weight:700;margin:0.1em 0}
.meaning{font-size:1.05em;margin:0.2em 0 0.6em}
.facts{display:flex;flex-wrap:wrap;gap:8px 26px;margin:0.4em 0 0.6em}
.facts div{min-width:140px}.facts b{display:block;font-size:0.8em;color:var(--muted);font-weight:600;
 text-transform:uppercase;letter-spacing:0.03em}
.alert{border-left:5px solid var(--warn);background:#fdf1ea;padding:6px 12px;margin:8px 0}
table{border-collapse:collapse;margin:6px 0 12px;font-size:0.92em}
th,td{border-bottom:1px solid var(--line);padding:3px 10px;text-align:left;vertical-align:top}
th{background:var(--soft);font-weight:600;white-space:nowrap}
td.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
figure{margin:14px 0 26px}
figure img{max-width:100%;height:auto;border:1px solid var(--line)}
figcaption{font-size:0.9em;color:var(--muted);max-width:900px}
details{margin:8px 0}
pre{background:var(--soft);padding:8px;overflow:auto;font-size:0.82em;max-height:420px}
ul.reasons li{margin:2px 0}
.muted{color:var(--muted)}
"""


_SCRIPT = """
(function () {
  var errors = [];
  window.addEventListener("error", function (e) {
    errors.push(String(e.message || "error"));
    if (document.body) { document.body.dataset.errors = errors.join(" | "); }
  });
  window.addEventListener("load", function () {
    var want = (document.body.dataset.expect || "").split(",").filter(Boolean);
    var shown = [], hidden = [];
    want.forEach(function (id) {
      var el = document.getElementById(id);
      var r = el ? el.getBoundingClientRect() : null;
      if (r && r.width > 0 && r.height > 0) { shown.push(id); } else { hidden.push(id); }
    });
    var ok = 0, imgs = document.images;
    for (var i = 0; i < imgs.length; i++) {
      if (imgs[i].complete && imgs[i].naturalWidth > 0) { ok++; }
    }
    document.body.dataset.visible = shown.join(",");
    document.body.dataset.hidden = hidden.join(",");
    document.body.dataset.images = ok + "/" + imgs.length;
    document.body.dataset.errors = errors.join(" | ");
  });
})();
"""


_CSP = ("default-src 'none'; img-src data:; style-src 'unsafe-inline'; script-src 'unsafe-inline'; "
        "base-uri 'none'; form-action 'none'")


# ---------------------------------------------------------------------------------- formatting
def _esc(v) -> str:
    return html.escape(str(v), quote=True)


def _is_num(v) -> bool:
    return isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, (bool, np.bool_))


def _fmt(v, digits: int = 4) -> str:
    """A number for a table: ``digits`` significant figures, '-' for missing or non-finite."""
    if v is None:
        return "\u2013"
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    if isinstance(v, (int, np.integer)):
        return f"{int(v)}"
    if _is_num(v):
        x = float(v)
        if not math.isfinite(x):
            return "\u2013"
        if x == 0:
            return "0"
        if abs(x) >= 1e7 or abs(x) < 1e-3:
            return f"{x:.{max(digits - 1, 1)}e}"
        if abs(x) >= 10 ** digits:
            return f"{x:.0f}"
        return f"{x:.{digits}g}"
    return str(v)


def _fmt_p(p, n_draws=None) -> str:
    """A p-value at its test's resolution (the classification's reasons use the same text)."""
    if not _is_num(p):
        return "\u2013"
    return format_p(p, n_draws, missing="\u2013")


def _pm(v, err, digits: int = 4) -> str:
    if err is None or not _is_num(err) or not math.isfinite(float(err)):
        return _fmt(v, digits)
    return f"{_fmt(v, digits)} \u00b1 {_fmt(err, 2)}"


def _vec(v, digits: int = 4) -> str:
    if v is None:
        return "\u2013"
    return "(" + ", ".join(_fmt(x, digits) for x in np.ravel(np.asarray(v, dtype=float))) + ")"


def _table(header, rows, num_cols=()) -> str:
    """An HTML table; cells are escaped here."""
    out = ["<table><thead><tr>"]
    out += [f"<th>{_esc(h)}</th>" for h in header]
    out.append("</tr></thead><tbody>")
    for r in rows:
        out.append("<tr>")
        for j, c in enumerate(r):
            cls = ' class="num"' if j in num_cols else ""
            out.append(f"<td{cls}>{_esc(c)}</td>")
        out.append("</tr>")
    out.append("</tbody></table>")
    return "".join(out)


# ---------------------------------------------------------------------------------- figures
def report_dpi(fig, dpi: float = FIGURE_DPI) -> tuple:
    """(rendered, stated) resolution in dots per inch of ``fig``'s PNG in the report.

    Narrow figures are rendered at ``NARROW_ZOOM`` times ``dpi`` and shown that much wider: their
    PNG states ``dpi`` in its pHYs chunk, from which the report takes the display width.
    """
    return dpi * (NARROW_ZOOM if float(fig.get_size_inches()[0]) < NARROW_IN else 1.0), float(dpi)


def _png_of_figure(fig, dpi: float) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    return buf.getvalue()


def _png_width_in(data: bytes):
    """Width of a PNG in inches from its IHDR and pHYs chunks (None when it states no resolution)."""
    if len(data) < 24 or not data.startswith(b"\x89PNG"):
        return None
    width_px = int.from_bytes(data[16:20], "big")
    i = data.find(b"pHYs", 0, 4096)
    if i < 0 or len(data) < i + 13 or data[i + 12] != 1:
        return None
    per_metre = int.from_bytes(data[i + 4:i + 8], "big")
    return width_px / (per_metre * 0.0254) if per_metre > 0 else None


def _embed(value, dpi: float):
    """(data URI, display width in inches or None) of a figure given as a matplotlib Figure, PNG/SVG
    bytes or a .png/.svg file."""
    if hasattr(value, "savefig"):
        width_in = float(value.get_size_inches()[0])
        zoom = report_dpi(value, dpi)[0] / dpi
        data = _png_of_figure(value, dpi * zoom)
        return "data:image/png;base64," + base64.b64encode(data).decode("ascii"), width_in * zoom
    if isinstance(value, (str, os.PathLike)):
        p = Path(value)
        if not p.is_file():
            raise InputError(f"figures: file not found: {p}")
        if p.suffix.lower() not in (".png", ".svg"):
            raise InputError(f"figures: {p}: expected a .png or .svg file, got '{p.suffix}'")
        value = p.read_bytes()
    if isinstance(value, (bytes, bytearray)):
        data = bytes(value)
        if data.startswith(b"\x89PNG"):
            return "data:image/png;base64," + base64.b64encode(data).decode("ascii"), _png_width_in(data)
        if b"<svg" in data[:4000]:
            return "data:image/svg+xml;base64," + base64.b64encode(data).decode("ascii"), None
        raise InputError("figures: the data given are neither PNG nor SVG")
    raise InputError(f"figures: expected a matplotlib Figure, PNG/SVG bytes or a file path, got {type(value).__name__}")


def _metal_ions(result, ions):
    from ..ranging.channels import assign_channels

    assign = assign_channels(ions.mass_to_charge, result.ranging.ranges, result.metals)
    sel = assign.weights().sum(axis=1) > 0
    return ions.x[sel], ions.y[sel], ions.z[sel]


def _standard_figures(result, ions, skip, dpi):
    """name -> (title, caption, data URI) of the figures drawn from the result; failures listed apart.

    Titles and captions come from :func:`probeseq.outputs.reporttext.figure_text`, the same words as
    for the figure files ``write_analysis`` hands over."""
    from . import figures, tracks

    st = result.statistics
    cl = result.classification
    figs, failed = {}, []

    def add(name, make):
        if name in skip:
            return
        try:
            fig = make()
            if fig is None:
                return
            figs[name] = figure_text(name, result) + (fig if isinstance(fig, tuple) else _embed(fig, dpi))
        except Exception as e:  # a figure that cannot be drawn must not cost the whole report
            failed.append(f"figure '{name}' could not be drawn: {type(e).__name__}: {str(e).splitlines()[0] if str(e) else ''}")

    add("tracks", lambda: tracks.plot_tracks(result.columns, result.decoded, size="two-column"))
    ranging = result.ranging

    def spectrum():
        from ..ranging.plot import plot_ranging, plot_spectrum

        if getattr(ranging, "spectrum", None) is not None and getattr(ranging, "peaks", None) is not None:
            return plot_ranging(ranging)
        if ions is not None:
            from ..ranging.spectrum import histogram

            return plot_spectrum(histogram(ions.mass_to_charge), ranging.ranges, result.metals)
        return None

    add("spectrum", spectrum)

    def overlaps():
        from ..ranging.plot import plot_overlaps

        return plot_overlaps(ranging) if getattr(ranging, "overlap_refinement", None) else None

    add("overlaps", overlaps)

    def reconstruction():
        from ..lattice.plot import plot_reconstruction

        return plot_reconstruction((result.columns.params or {}).get("reconstruction"),
                                   efficiency=result.decoded.to_dict().get("radial_efficiency"))

    add("reconstruction", reconstruction)

    def density():
        if ions is None:
            return None
        from ..lattice.plot import plot_rod_density

        x, y, z = _metal_ions(result, ions)
        if x.size == 0:
            return None
        with tempfile.TemporaryDirectory() as tmp:
            p = plot_rod_density(x, y, z, result.columns, Path(tmp) / "density.png")
            return _embed(p, dpi)

    add("density", density)
    add("run_lengths", lambda: figures.plot_run_lengths(st, size="two-column"))
    if getattr(st, "rod_to_rod", None) is not None:
        add("rod_to_rod", lambda: figures.plot_rod_to_rod(st, copy_threshold=(cl.thresholds or {}).get("copy_threshold"),
                                                         size="one-column"))
    if result.groups is not None:
        add("groups", lambda: figures.plot_group_variance(result.groups, size="one-column"))
    return figs, failed


# ---------------------------------------------------------------------------------- sections
def _verdict(result) -> str:
    cl = result.classification
    col = result.columns
    lb = (cl.thresholds or {}).get("long_block_sites", getattr(result.options, "long_block_sites", 8))
    meaning = _LABEL_MEANING.get(cl.label, "").format(lb=float(lb))
    out = ['<section id="verdict"><h2>Verdict</h2>',
           f'<p class="label">{_esc(cl.label)}</p>',
           f'<p class="meaning">{_esc(meaning)}</p>',
           '<div class="facts">',
           f"<div><b>confidence</b>{_esc(f'{100 * float(cl.confidence):.0f} %')}</div>",
           f"<div><b>along the rods</b>{_esc(cl.along_rod)}</div>",
           f"<div><b>rod to rod</b>{_esc(cl.rod_to_rod)}</div>",
           f"<div><b>data</b>{_esc(f'{col.n_rods} rods x {col.n_sites} sites, {int(col.mask.sum())} used')}</div>",
           f"<div><b>metals</b>{_esc(', '.join(result.metals))}</div>",
           "</div>",
           f'<p class="meaning">{_esc(_CONFIDENCE_MEANING.format(share=100 * float(getattr(cl, "bootstrap_share", 0.0))))}</p>']
    note = synthetic_note(result.provenance)
    if note:
        body = note.split(": ", 1)[-1]
        out.insert(1, f'<p class="alert" id="synthetic-note"><b>Synthetic data:</b> {_esc(body)}.</p>')
    per_metal = getattr(cl, "per_metal", None) or {}
    if per_metal:
        out.append("<h3>Each metal along the rods</h3><table><tr><th>metal</th><th>arrangement</th>"
                   "<th>next to itself</th><th>independent sites</th><th>self-persistence</th></tr>")
        for mt, d in per_metal.items():
            def pc(x):
                return "n/a" if x is None or not math.isfinite(float(x)) else f"{100 * float(x):.1f} %"
            lam = d.get("self_persistence")
            out.append(f"<tr><td>{_esc(mt)}</td><td>{_esc(d.get('class', ''))}</td><td>{_esc(pc(d.get('self_neighbour')))} "
                       f"({_esc(pc(d.get('self_neighbour_low')))}-{_esc(pc(d.get('self_neighbour_high')))})</td>"
                       f"<td>{_esc(pc(d.get('independent')))}</td>"
                       f"<td>{_esc('n/a' if lam is None or not math.isfinite(float(lam)) else f'{float(lam):.2f}')}</td></tr>")
        out.append("</table>")
    if not col.resolvable:
        out.append(f'<p class="alert">{_esc(f"Single rods are not resolvable (misassigned fraction {col.misassigned_fraction:.2f}: share of the ions of a rod expected nearer another rod): ")}'
                   f'{_esc("per-rod sequences mix neighbouring rods; rely on the groups-of-rods analysis.")}</p>')
    if cl.reasons:
        out.append("<h3>Why</h3><ul class=\"reasons\">")
        out += [f"<li>{_esc(r)}</li>" for r in cl.reasons]
        out.append("</ul>")
    shares = getattr(cl, "label_shares", None) or {}
    if len(shares) > 1:
        txt = ", ".join(f"{k} {100 * float(v):.0f} %" for k, v in sorted(shares.items(), key=lambda kv: -kv[1]))
        out.append(f'<p class="muted">{_esc("Labels over bootstrap resamples: " + txt)}</p>')
    out.append("</section>")
    return "".join(out)


def _stat_rows(st, metals):
    """(description, unit, name) of the statistics shown, in order."""
    rows = []
    for m in metals:
        rows.append((f"composition of {m} on the rod sites (decoder's site occupancy)", "site fraction", f"composition.{m}"))
    for m in metals:
        rows.append((f"mean run length of {m} (headline: fitted chain, 1 / (1 - P_kk))", "sites", f"mean_run_length_sites.{m}"))
        rows.append((f"mean run length of {m} (headline, times the site pitch)", "nm", f"mean_run_length_nm.{m}"))
        rows.append((f"mean run length of {m} if sites were independent", "sites", f"independent_run_length_sites.{m}"))
        rows.append((f"run length of {m} / independent-sites value", "", f"run_length_ratio.{m}"))
    rows.append(("persistence (0 = independent sites, 1 = never changes)", "", "persistence"))
    for m in metals:
        rows.append((f"persistence of {m}", "", f"persistence_per_metal.{m}"))
    rows.append(("entropy rate", "bits/site", "entropy_rate_bits"))
    rows.append(("entropy of independent sites (same composition)", "bits/site", "entropy_independent_bits"))
    rows.append(("runs test z (least abundant metal; negative = fewer runs than random)", "", "runs_test.z"))
    rows.append(("runs test p", "", "runs_test.p"))
    rows.append(("G\u00b2 statistic of the Markov test (expected counts)", "", "markov_test.g2"))
    rows.append(("neighbouring-rod correlation at lag 0 (posteriors)", "", "rod_to_rod.corr"))
    rows.append(("neighbouring-rod correlation at lag 0, corrected for decoding noise", "", "rod_to_rod.corr_corrected"))
    rows.append(("largest neighbouring-rod correlation over lags", "", "rod_to_rod.statistic"))
    rows.append(("largest correlation, corrected (compared with the copy threshold)", "", "rod_to_rod.statistic_corrected"))
    rows.append(("rod-to-rod permutation p-value", "", "rod_to_rod.p_value"))
    rows.append(("Cohen's kappa of neighbouring rods' decoded states", "", "rod_to_rod.kappa"))
    return [r for r in rows if r[2] in st.estimates]


def _composition_table(result) -> str:
    """The two compositions, labelled: the spectrum's (the headline) and the rod model's site occupancy."""
    st = result.statistics
    rcomp = (result.ranging.to_dict() or {}).get("composition", {}) or {}
    rows = []
    for m in result.metals:
        c = rcomp.get(m) or {}
        f, sd = c.get("fraction"), c.get("fraction_err")
        spec = (_fmt(f), format_interval(f - 1.96 * (sd or 0.0), f + 1.96 * (sd or 0.0), _fmt, "\u2013")) \
            if _is_num(f) else ("\u2013", "\u2013")
        est, lo, hi = st.interval(f"composition.{m}") if f"composition.{m}" in st.estimates else (None, None, None)
        rows.append((m,) + spec + (_fmt(est), format_interval(lo, hi, _fmt, "\u2013")))
    head = ("metal", "from the mass spectrum (results.json composition)", "95 % interval (counting, background)",
            "on the rod sites (decoder's occupancy)", "95 % interval (bootstrap over rods)")
    return ("<h3>Composition, two ways</h3><p>Atomic fractions of the metals. The spectrum's (background "
            "subtracted, overlaps deconvolved, every metal ion of the run) is the headline composition; the rod "
            "model's occupancy of the decoded sites is given beside it as a check.</p>"
            + _table(head, rows, num_cols=(1, 2, 3, 4)))


def _statistics(result) -> str:
    st = result.statistics
    rows = []
    rr = getattr(st, "rod_to_rod", None)
    n_null = int(np.isfinite(np.asarray(rr.null, dtype=float)).sum()) if rr is not None else None
    for desc, unit, name in _stat_rows(st, result.metals):
        est, lo, hi = st.interval(name)
        if name.endswith(".p") or name.endswith("p_value"):  # a p-value has no interval
            rows.append((desc, _fmt_p(est, n_null if name == "rod_to_rod.p_value" else None), "\u2013", "\u2013",
                         unit, name))
        else:
            rows.append((desc, _fmt(est), _fmt(lo), _fmt(hi), unit, name))
    out = ['<section id="statistics"><h2>Statistics</h2>',
           f'<p>Estimates with 95 % percentile intervals from {int(st.n_boot)} bootstrap resamples over rods '
           f'({int(st.n_rods)} rods, {int(st.n_sites_used)} decoded sites, pitch {_esc(_fmt(st.pitch_nm))} nm). '
           'p-values have no interval; a permutation p-value at the floor of its null draws is shown as '
           '"\u2264 1/(draws + 1)", an analytic one below 1e-300 as "< 1e-300".</p>',
           _composition_table(result),
           _table(("statistic", "estimate", "95 % low", "95 % high", "unit", "name"), rows, num_cols=(1, 2, 3)),
           f'<p class="muted" id="run-length-definition">{_esc(run_length_note(result))}</p>']
    mk = st.markov_test or {}
    out.append("<h3>Is there memory along the rods?</h3>")
    out.append(_table(("test", "statistic", "df", "p", "BIC Markov", "BIC independent"),
                      [(f"likelihood ratio, Markov chain vs independent sites ({mk.get('source', '')})",
                        _fmt(mk.get("lr_stat")), _fmt(mk.get("lr_df")), _fmt_p(mk.get("lr_pvalue")),
                        _fmt(mk.get("bic")), _fmt(mk.get("bic_indep"))),
                       ("G\u00b2 on expected transition counts", _fmt(mk.get("g2")), _fmt(mk.get("g2_df")),
                        _fmt_p(mk.get("g2_pvalue")), "", "")], num_cols=(1, 2, 3, 4, 5)))
    per = getattr(st, "runs_test_per_metal", None) or {}
    if per:
        out.append("<h3>Runs test per metal (decoded paths)</h3>")
        out.append(_table(("metal", "runs", "expected if random", "z", "p"),
                          [(m, _fmt(d.get("n_runs")), _fmt(d.get("expected_runs")), _fmt(d.get("z")),
                            _fmt_p(d.get("p"))) for m, d in per.items()], num_cols=(1, 2, 3, 4)))
    other = sorted(set(st.estimates) - {r[2] for r in _stat_rows(st, result.metals)})
    if other:
        rows = []
        for name in other:
            est, lo, hi = st.interval(name)
            rows.append((name, _fmt(est), _fmt(lo), _fmt(hi)))
        out.append("<details><summary>All other statistics</summary>")
        out.append(_table(("name", "estimate", "95 % low", "95 % high"), rows, num_cols=(1, 2, 3)))
        out.append("</details>")
    if st.notes:
        out.append("<p class=\"muted\">" + _esc("Notes: " + "; ".join(st.notes)) + "</p>")
    out.append("</section>")
    return "".join(out)


def _figures(figs) -> str:
    out = ['<section id="figures"><h2>Figures</h2>']
    if not figs:
        out.append("<p>No figures.</p>")
    for name, (title, caption, uri, width_in) in figs.items():
        fid = FIGURE_IDS.get(name, "fig-" + "".join(c if c.isalnum() else "-" for c in name.lower()))
        style = f' style="width:{width_in * DISPLAY_PX_PER_IN:.0f}px"' if width_in else ""
        out.append(f'<figure id="{_esc(fid)}"><img src="{uri}" alt="{_esc(title)}"{style}>'
                   f"<figcaption><b>{_esc(title)}.</b> {_esc(caption)}</figcaption></figure>")
    out.append("</section>")
    return "".join(out)


def _parameters(result) -> str:
    dec = result.decoded
    col = result.columns
    metals = result.metals
    out = ['<section id="parameters"><h2>Fitted parameters</h2>', "<h3>Decoder (hidden Markov model of each rod)</h3>"]
    rows = [("detection efficiency eta (own ion of a site detected)", _fmt(dec.eta), ""),
            ("crosstalk rate (composition-proportional extra counts)", _fmt(dec.crosstalk_rate), "counts/site"),
            ("background per channel", _vec(dec.background), "counts/site, " + ", ".join(metals)),
            ("extra-count rate per channel", _vec(dec.extra_rate), "counts/site, " + ", ".join(metals)),
            ("share of counts that are extras", _fmt(dec.extra_fraction), ""),
            ("stationary distribution (composition)", _vec(dec.stationary), ", ".join(metals)),
            ("persistence", _fmt(dec.persistence), ""),
            ("log-likelihood, Markov / independent sites", f"{_fmt(dec.loglik, 8)} / {_fmt(dec.loglik_indep, 8)}", "nats"),
            ("EM iterations", em_iterations_text(dec), ""),
            ("observed sites", _fmt(int(dec.n_obs)), "")]
    out.append(_table(("parameter", "value", "unit"), rows, num_cols=(1,)))
    a = np.asarray(dec.transmat, dtype=float)
    out.append("<p>Transition matrix (row: metal at a site; column: metal at the next site):</p>")
    out.append(_table(["from \\ to"] + list(metals), [[m] + [_fmt(v) for v in a[i]] for i, m in enumerate(metals)],
                      num_cols=tuple(range(1, len(metals) + 1))))
    reg = dict((col.params or {}).get("registration", {}) or {})
    for key in reg.get("fixed") or ():
        reg[f"{key}_err"] = None  # fixed by the user: no uncertainty
    fixed = set(reg.get("fixed") or ())

    def fx(key, text):
        return text + (" (fixed)" if key in fixed else "")

    cinfo = (col.params or {}).get("columns", {}) or {}
    out.append("<h3>Lattice registration and rod columns</h3>")
    rows = [("rotation", fx("rotation_deg", _pm(reg.get("rotation_deg"), reg.get("rotation_deg_err"))), "deg"),
            ("scale", fx("scale", _pm(reg.get("scale"), reg.get("scale_err"), 6)), ""),
            ("offset (x, y)", fx("offset_nm", _pair_pm(reg.get("offset_nm"), reg.get("offset_nm_err"))), "nm"),
            ("tilt (dx/dz, dy/dz)", _pair_pm(reg.get("tilt", col.tilt), reg.get("tilt_err")), ""),
            ("tilt angle, azimuth", f"{_fmt(reg.get('tilt_deg'))}, {_fmt(reg.get('tilt_azimuth_deg'))}", "deg"),
            ("lateral blur sigma", _pm(reg.get("sigma_xy_nm"), reg.get("sigma_xy_nm_err")), "nm"),
            ("misassigned fraction (a rod's ions expected nearer another rod)", _fmt(col.misassigned_fraction), "fraction of a rod's ions"),
            ("single rods resolvable", "yes" if col.resolvable else "no",
             f"threshold {_fmt(reg.get('resolvable_threshold'))}" if reg.get("resolvable_threshold") is not None else ""),
            ("registration quality / peak ratio", f"{_fmt(reg.get('quality'))} / {_fmt(reg.get('peak_ratio'))}", ""),
            ("parameters fixed by the user", ", ".join(reg.get("fixed") or []) or "none", ""),
            ("site pitch along the rods", _fmt(col.pitch_nm), "nm"),
            ("rods, sites, sites used", f"{col.n_rods}, {col.n_sites}, {int(col.mask.sum())}", ""),
            ("column radius (cutoff)", _fmt(cinfo.get("cutoff_nm")), "nm"),
            ("metal ions, in rods", f"{int(result.n_metal_ions)}, {_fmt(float(col.counts.sum()), 6)}", "")]
    out.append(_table(("parameter", "value", "unit"), rows, num_cols=(1,)))
    g = result.groups
    if g is not None:
        out.append("<h3>Groups of rods</h3>")
        rows = [("rod-to-rod correlation rho (variance fit)", _fmt(g.rho), ""),
                ("rho of neighbouring single rods", _fmt(g.rho_neighbours), ""),
                ("per-site variance sigma\u00b2 (fit / expected)", f"{_fmt(g.sigma2)} / {_fmt(g.sigma2_expected)}", ""),
                ("persistence along the rods", _fmt(g.persistence), ""),
                ("correlation length", f"{_fmt(g.correlation_length_sites)} sites ({_fmt(g.correlation_length_nm)} nm)", ""),
                ("detection efficiency (moments)", _fmt(g.eta), ""),
                ("extra counts per rod-site", _fmt(g.extra_rate), "counts"),
                ("group sizes (groups)", ", ".join(f"{int(n)} ({int(k)})" for n, k in zip(g.group_sizes, g.n_groups)), "")]
        out.append(_table(("parameter", "value", "unit"), rows, num_cols=(1,)))
    out.append("</section>")
    return "".join(out)


def _pair_pm(v, err) -> str:
    if v is None:
        return "\u2013"
    v = np.ravel(np.asarray(v, dtype=float))
    e = np.ravel(np.asarray(err, dtype=float)) if err is not None else np.full(v.shape, np.nan)
    return "(" + ", ".join(_pm(a, b) for a, b in zip(v, e)) + ")"


def _collect_warnings(result, extra) -> list:
    """The analysis's one warnings list (``result.warnings``: the terminal's and results.json's), then
    what went wrong while the report was written (``extra``: figures that could not be drawn)."""
    return list(dict.fromkeys([str(w) for w in (result.warnings or ())] + [str(w) for w in extra]))


def _warnings(warns) -> str:
    out = ['<section id="warnings"><h2>Warnings</h2>']
    if warns:
        out.append("<ul>" + "".join(f"<li>{_esc(w)}</li>" for w in warns) + "</ul>")
    else:
        out.append("<p>No warnings: rods resolvable, counts sufficient, fits converged.</p>")
    out.append("</section>")
    return "".join(out)


def _cautions() -> str:
    out = ['<section id="cautions"><h2>Cautions</h2><ul>']
    out += [f"<li><b>{_esc(t)}.</b> {_esc(body)}</li>" for t, body in CAUTIONS]
    out.append("</ul></section>")
    return "".join(out)


def _json_safe(v):
    from ..utils.marks import to_jsonable

    return to_jsonable(v)


def _provenance(result) -> str:
    prov = dict(result.provenance or {})
    inp = prov.get("input") or {}
    rows = [("tool", f"{prov.get('tool', 'probeseq')} {prov.get('version', __version__)}"),
            ("report written by", f"probeseq {__version__}"),
            ("command line", prov.get("command_line") or "(library call)"),
            ("input file", inp.get("source") or result.ions_summary.get("source") or "\u2013"),
            ("input sha256", inp.get("sha256") or result.ions_summary.get("sha256") or "(not computed)"),
            ("ions in the file", _fmt(result.ions_summary.get("n_ions"))),
            ("rows dropped on reading", _fmt(result.ions_summary.get("rows_dropped"))),
            ("lattice", prov.get("lattice_source") or getattr(result.lattice, "name", "\u2013")),
            ("metals", ", ".join(prov.get("metals") or result.metals)),
            ("seed", _fmt(prov.get("seed", getattr(result.options, "seed", None))))]
    runs_on = ", ".join(str(prov[k]) for k in ("python", "platform") if prov.get(k))
    if runs_on:  # an empty field is left out, never shown blank
        rows.append(("python" + (", platform" if prov.get("platform") else ""), runs_on))
    out = ['<section id="provenance"><h2>Provenance</h2>', _table(("item", "value"), rows)]
    opts = prov.get("options") or (result.options.to_dict() if hasattr(result.options, "to_dict") else {})
    if opts:
        out.append("<h3>Parameters of the analysis</h3>")
        out.append(_table(("option", "value"), [(k, "default (fitted)" if v is None else
                                                  (json.dumps(v) if isinstance(v, (list, dict)) else v))
                                                 for k, v in sorted(opts.items())]))
    tim = result.timings_s or {}
    if tim:
        out.append("<h3>Time per stage</h3>")
        out.append(_table(("stage", "seconds"), [(k, _fmt(v, 3)) for k, v in tim.items()], num_cols=(1,)))
    full = json.dumps(_json_safe(prov), indent=2, sort_keys=True)
    out.append(f"<details><summary>Full provenance record (JSON)</summary><pre>{_esc(full)}</pre></details>")
    out.append("</section>")
    return "".join(out)


# ---------------------------------------------------------------------------------- public
def _check_result(result):
    need = ("metals", "columns", "decoded", "statistics", "classification", "ranging", "warnings", "provenance")
    missing = [n for n in need if not hasattr(result, n)]
    if missing:
        raise InputError(f"write_report: expected an AnalysisResult, got {type(result).__name__} "
                         f"(no {', '.join(missing)})")


def report_html(result, *, ions=None, figures=None, figure_dpi: float = FIGURE_DPI) -> str:
    """The report of an analysis as one HTML document (see :func:`write_report`)."""
    _check_result(result)
    figures = dict(figures or {})
    skip = set(figures)
    figs, failed = _standard_figures(result, ions, skip, figure_dpi)
    for name, value in figures.items():
        if value is None:
            continue
        title, caption = figure_text(name, result)
        if isinstance(value, tuple):
            value, t, c = (tuple(value) + ("", ""))[:3]
            title, caption = str(t) or title, str(c) or caption
        figs[name] = (title, caption) + _embed(value, figure_dpi)
    order = list(FIGURE_IDS)
    figs = dict(sorted(figs.items(), key=lambda kv: order.index(kv[0]) if kv[0] in order else len(order)))
    warns = _collect_warnings(result, failed)
    src = (result.provenance or {}).get("input", {}).get("source") or result.ions_summary.get("source") or ""
    name = Path(src).parent.name if src and Path(src).parent.name else (src or "analysis")
    when = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    expect = list(SECTION_IDS) + [FIGURE_IDS.get(n, "fig-" + "".join(c if c.isalnum() else "-" for c in n.lower()))
                                  for n in figs]
    if synthetic_note(result.provenance):  # the banner must be on screen too
        expect.insert(1, "synthetic-note")
    nav = "".join(f'<a href="#{s}">{_esc(s)}</a>' for s in SECTION_IDS)
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{_esc(_CSP)}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_esc('probeseq report: ' + name)}</title>",
        f"<style>{_STYLE}</style>",
        f"<script>{_SCRIPT}</script></head>",
        f'<body data-expect="{_esc(",".join(expect))}"><main>',
        f"<header><h1>{_esc('Metal sequence along the rods: ' + name)}</h1>",
        f"<p>{_esc(f'probeseq {__version__} report, written {when}. Input: {src or chr(8211)}')}</p>",
        f"<nav>{nav}</nav></header>",
        _verdict(result),
        _statistics(result),
        _figures(figs),
        _parameters(result),
        _warnings(warns),
        _cautions(),
        _provenance(result),
        "</main>",
        "</body></html>",
    ]
    return "\n".join(parts)


def write_report(result, path, *, ions=None, figures=None, figure_dpi: float = FIGURE_DPI) -> Path:
    """Write the self-contained HTML report of an analysis.

    Parameters
    ----------
    result : probeseq.pipeline.options.AnalysisResult
    path : str or Path
        The HTML file to write (e.g. ``OUTDIR/report.html``); parent folders are created. The file
        is written beside its target and moved into place when complete.
    ions : IonList, optional
        The ion list analysed; adds the metal density figure with the fitted rod lattice (and the
        spectrum when the ranging result carries none).
    figures : dict, optional
        name -> matplotlib Figure, PNG/SVG bytes, path of a ``.png``/``.svg`` file, or a tuple
        ``(figure, title, caption)``. A standard name (``tracks``, ``spectrum``, ``density``,
        ``run_lengths``, ``rod_to_rod``, ``groups``) replaces that figure, None leaves it out; other
        names add figures (e.g. ``comparison``).
    figure_dpi : float, dots per inch
        Resolution of the embedded figures.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    InputError
        ``result`` is not an analysis result, or a figure given in ``figures`` cannot be embedded.
    """
    doc = report_html(result, ions=ions, figures=figures, figure_dpi=figure_dpi)
    p = Path(path)
    p.parent.mkdir(parents=True, exist_ok=True)
    tmp = p.with_name(f".{p.name}.tmp-{os.getpid()}")
    try:
        tmp.write_text(doc, encoding="utf-8")
        os.replace(tmp, p)
    finally:
        if tmp.exists():
            tmp.unlink()
    return p
