"""Compare analysed runs: a table of statistics with intervals, ordered by a metadata field, and
bootstrap tests of whether two runs differ.

Each run is an ``analyze`` output folder (``results.json`` plus ``bootstrap.h5``). Metadata fields
are the ``[sample]`` entries of the run description (for example ``synthesis_temperature_c``).

The test of a difference between runs A and B for a statistic s uses the two independent bootstrap
distributions over rods: the replicates of ``s_A - s_B`` (paired at random, each run's resamples
being independent of the other's) approximate the sampling distribution of the difference; the
two-sided p-value is ``2 min(P(d <= 0), P(d >= 0))`` with the usual +1 correction, and the 95 %
interval of the difference is its percentile interval (Efron & Tibshirani 1993, ch. 13 and 16,
recalled from memory). With ``B`` paired draws that p-value cannot fall below ``2 / (B + 1)``; it is
written at that resolution (``p_value_text``, "≤ 0.01" for 200) and intervals as "low to high".
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..exceptions import DataQualityWarning, InputError
from ..utils.marks import finite_or_none
from ..utils.textformat import format_interval, format_p
from ..utils.tomlfile import short_repr

__all__ = ['RunRecord', 'Comparison', 'load_runs', 'compare_runs', 'difference_test', 'order_value', 'KEY_STATISTICS',
           'STATISTIC_TEXT', 'field_label', 'statistic_text', 'comparison_figure', 'plot_comparison']

#: statistics shown in the comparison figure, per metal where the name ends in '.'
KEY_STATISTICS = ("composition.", "mean_run_length_sites.", "persistence", "entropy_rate_bits", "rod_to_rod.corr")


@dataclass(frozen=True)
class RunRecord:
    """One analysed run: its folder, metadata, metals, label and statistics with intervals."""

    folder: Path
    name: str
    metals: tuple
    metadata: dict
    label: str
    confidence: float
    intervals: dict
    replicates: dict = field(default_factory=dict)


def _find_outdirs(paths) -> list:
    out = []
    for p in map(Path, paths):
        if (p / "results.json").is_file():
            out.append(p)
        elif p.is_dir():
            # hidden folders (probeseq's staging folders among them) are never runs
            subs = sorted(q for q in p.iterdir() if not q.name.startswith(".") and (q / "results.json").is_file())
            if not subs:
                raise InputError(f"{p}: holds no results.json, nor folders that do (run 'probeseq analyze' first)")
            out.extend(subs)
        else:
            raise InputError(f"analysis folder not found: {p}")
    return out


def load_runs(paths) -> list:
    """Read the output folders (or folders of them) into :class:`RunRecord` objects.

    ``results.json`` is checked by :func:`probeseq.outputs.results.load_results` and ``bootstrap.h5`` by
    :func:`probeseq.outputs.results.read_replicates`; a damaged file is an :class:`InputError` naming it.
    """
    from ..outputs.results import load_results, read_replicates

    records = []
    for d in _find_outdirs(paths):
        r = load_results(d)
        prov = r["provenance"]
        sample = dict(prov.get("sample") or {})
        name = str(sample.get("name") or prov.get("run_name") or d.name)
        records.append(RunRecord(folder=d, name=name, metals=tuple(prov.get("metals") or []), metadata=sample,
                                 label=r["classification"]["label"],
                                 confidence=float(r["classification"]["confidence"]),
                                 intervals=r["statistics"]["intervals"], replicates=read_replicates(d)))
    names = [rec.name for rec in records]
    if len(set(names)) != len(names):
        records = [RunRecord(**{**rec.__dict__, "name": f"{rec.name} ({rec.folder.name})"}) for rec in records]
    return records


def order_value(value):
    """A metadata value as a number to order runs by, or None when it is not one.

    Numbers are taken as they are and text that reads as a number (``"150"``) is converted; NaN,
    infinities, true/false, other text, lists and tables give None (such runs are ordered after
    the numeric ones, by their text).
    """
    if isinstance(value, bool):
        return None
    if isinstance(value, (int, float)):
        v = float(value)
    elif isinstance(value, str):
        try:
            v = float(value.strip())
        except ValueError:
            return None
    else:
        return None
    return finite_or_none(v)


def _cell(value):
    """A metadata value for one table cell: numbers as they are, anything else as short text."""
    if value is None or (isinstance(value, (int, float)) and not isinstance(value, bool)):
        return value
    return short_repr(value) if not isinstance(value, str) else value


def _n_draws(rep_a, rep_b) -> int:
    """Paired draws :func:`difference_test` makes (0 when it makes none): its p-value's resolution."""
    na = int(np.isfinite(np.asarray(rep_a, float)).sum())
    nb = int(np.isfinite(np.asarray(rep_b, float)).sum())
    return max(na, nb) if min(na, nb) >= 10 else 0


def _eq(p_text: str) -> str:
    """'= 0.140' or the text itself when it is a bound ('\u2264 0.01', '< 1e-300')."""
    return p_text if p_text[:1] in "<\u2264" else f"= {p_text}"


def _num(v) -> str:
    """A statistic or a difference for text: three significant figures, no exponent for usual sizes."""
    v = float(v)
    return f"{v:.3g}" if v == 0 or 1e-3 <= abs(v) < 1e5 else f"{v:.2e}"


def difference_test(rep_a, rep_b, random_state=None):
    """Bootstrap test of ``a - b``: (difference interval low, high, two-sided p).

    Parameters
    ----------
    rep_a, rep_b : 1-D arrays
        Bootstrap replicates of the statistic in the two runs (independent resamples).

    Returns
    -------
    low, high : float
        95 % percentile interval of ``a - b``, in the statistic's unit.
    p : float
        Two-sided p-value; with ``B`` paired draws it is at least ``2 / (B + 1)`` (0.00995 for
        200), so it is printed at that resolution (:func:`probeseq.utils.textformat.format_p`).
    """
    a = np.asarray(rep_a, float)
    b = np.asarray(rep_b, float)
    a, b = a[np.isfinite(a)], b[np.isfinite(b)]
    if a.size < 10 or b.size < 10:
        return float("nan"), float("nan"), float("nan")
    rng = np.random.default_rng(random_state)
    n = max(a.size, b.size)
    d = rng.choice(a, n) - rng.choice(b, n)
    lo, hi = np.percentile(d, [2.5, 97.5])
    p = 2 * min((1 + np.sum(d <= 0)) / (n + 1), (1 + np.sum(d >= 0)) / (n + 1))
    return float(lo), float(hi), float(min(1.0, p))


@dataclass(frozen=True)
class Comparison:
    """Runs ordered by a metadata field, their statistics, and pairwise difference tests."""

    runs: tuple
    order_by: str | None
    statistics: tuple
    common_metals: tuple
    differences: tuple
    notes: tuple

    def table_rows(self) -> list:
        """Rows (dict) of the comparison table: one per run and statistic."""
        rows = []
        for rec in self.runs:
            for s in self.statistics:
                iv = rec.intervals.get(s) or {}
                rows.append({"run": rec.name, "order_value": _cell(rec.metadata.get(self.order_by))
                             if self.order_by else "",
                             "label": rec.label, "statistic": s, "estimate": iv.get("estimate"),
                             "low": iv.get("low"), "high": iv.get("high")})
        return rows

    def text_lines(self, show=None, alpha: float = 0.01, name_width: int = 28) -> list:
        """The comparison as terminal lines: one per run, then the differences below ``alpha``, then notes.

        Intervals read "low to high" (never "-0.02--0.01"), p-values are at the resolution of
        the test (``"\u2264 0.01"`` when none of the paired resamples reached the observed
        difference), and a run name longer than ``name_width`` is shortened with "..." here and
        given whole in the key line that follows the table.

        Parameters
        ----------
        show : sequence of str, optional
            Statistics on each run's line (default: mean run lengths in sites and the persistence).
        alpha : float
            Differences with a p-value below this are listed.
        name_width : int
            Characters of a run name on its line.
        """
        show = list(show) if show is not None else [s for s in self.statistics
                                                     if s.startswith("mean_run_length_sites.") or s == "persistence"]
        by = self.order_by or "order"
        w = max(12, len(by))
        lines = [f"{'run':{name_width}s} {by:>{w}s} {'label':>18s}  key statistics (estimate, 95 % interval)"]
        cut, short = [], {}
        for rec in self.runs:
            parts = []
            for s in show:
                iv = rec.intervals.get(s) or {}
                if iv.get("estimate") is not None:
                    parts.append(f"{s.replace('mean_run_length_sites.', 'run ')} {_num(iv['estimate'])} "
                                 f"({format_interval(iv.get('low'), iv.get('high'), _num)})")
            name = rec.name if len(rec.name) <= name_width else rec.name[:name_width - 3] + "..."
            if name != rec.name:
                cut.append(f"{name} = {rec.name}")
            short[rec.name] = name
            value = rec.metadata.get(self.order_by) if self.order_by else None
            lines.append(f"{name:{name_width}s} {'-' if value is None else str(_cell(value)):>{w}s} "
                         f"{rec.label:>18s}  " + "; ".join(parts))
        lines += [f"  ({c})" for c in cut]
        for d in self.differences:
            p = d.get("p_value")
            if d["statistic"] in show and p is not None and p == p and p < alpha and d.get("difference") is not None:
                a, b = short.get(d["run_a"], d["run_a"]), short.get(d["run_b"], d["run_b"])
                lines.append(f"  {a} vs {b}: {d['statistic']} differs by {_num(d['difference'])} "
                             f"(95 % interval {d.get('interval_text') or format_interval(d['low'], d['high'], _num)}, "
                             f"bootstrap p {_eq(d.get('p_value_text') or format_p(p))})")
        return lines + [f"note: {n}" for n in self.notes]

    def to_dict(self) -> dict:
        return {"order_by": self.order_by, "runs": [r.name for r in self.runs],
                "labels": {r.name: r.label for r in self.runs},
                "metadata": {r.name: r.metadata for r in self.runs},
                "common_metals": list(self.common_metals), "statistics": list(self.statistics),
                "table": self.table_rows(), "differences": list(self.differences), "notes": list(self.notes)}


def compare_runs(records, order_by: str | None = "synthesis_temperature_c", random_state=0) -> Comparison:
    """Order runs, pick the statistics they share, and test consecutive pairs for differences."""
    import warnings

    from ..utils.validate import check_seed

    check_seed(random_state)
    recs = list(records)
    if len(recs) < 1:
        raise InputError("compare needs at least one analysed run")
    notes = []
    metal_sets = [set(r.metals) for r in recs]
    common = set.intersection(*metal_sets) if metal_sets else set()
    if any(s != metal_sets[0] for s in metal_sets):
        msg = ("runs have different metals (" + "; ".join(f"{r.name}: {','.join(r.metals)}" for r in recs) +
               f"); comparing what is common: {','.join(sorted(common)) or 'no metal'}")
        warnings.warn(msg, DataQualityWarning, stacklevel=2)
        notes.append(msg)
    if order_by:
        missing = [r.name for r in recs if r.metadata.get(order_by) is None]
        if missing:
            notes.append(f"runs without '{order_by}' are placed last: {', '.join(missing)}")
        odd = [f"{r.name} ({str(r.metadata[order_by])[:40]!r})" for r in recs
               if r.metadata.get(order_by) is not None and order_value(r.metadata[order_by]) is None]
        if odd:
            msg = (f"'{order_by}' is not a number in {len(odd)} run(s), placed after the numeric ones in text "
                   f"order: {', '.join(odd)}")
            warnings.warn(msg, DataQualityWarning, stacklevel=2)
            notes.append(msg)

        def key(r):
            v = r.metadata.get(order_by)
            x = order_value(v)
            group = 0 if x is not None else 2 if v is None else 1
            return (group, 0.0 if x is None else x, "" if v is None else str(v), r.name)

        recs.sort(key=key)
    names = set.intersection(*[set(r.intervals) for r in recs])
    per_metal = {n for n in names if "." in n and n.rsplit(".", 1)[1] in {m for s in metal_sets for m in s}}
    keep = sorted(n for n in names if n not in per_metal or n.rsplit(".", 1)[1] in common)
    diffs = []
    for a, b in zip(recs[:-1], recs[1:]):
        for s in keep:
            if s in a.replicates and s in b.replicates:
                lo, hi, p = difference_test(a.replicates[s], b.replicates[s], random_state)
                ea = (a.intervals.get(s) or {}).get("estimate")
                eb = (b.intervals.get(s) or {}).get("estimate")
                n = _n_draws(a.replicates[s], b.replicates[s])
                diffs.append({"run_a": a.name, "run_b": b.name, "statistic": s,
                              "difference": None if ea is None or eb is None else ea - eb,
                              "low": lo, "high": hi, "p_value": p, "n_resamples": n,
                              "p_value_text": format_p(p, n or None, two_sided=True),
                              "interval_text": format_interval(lo, hi, _num)})
    return Comparison(runs=tuple(recs), order_by=order_by, statistics=tuple(keep), common_metals=tuple(sorted(common)),
                      differences=tuple(diffs), notes=tuple(notes))


#: readable title and y-axis label (unit or meaning) of each statistic of the comparison figure
STATISTIC_TEXT = {
    "composition": ("Composition on the rod sites", "site fraction (0 to 1)"),
    "mean_run_length_sites": ("Mean run length (headline)", "sites, 1 / (1 - P_kk) of the fitted chain"),
    "mean_run_length_nm": ("Mean run length", "nm"),
    "independent_run_length_sites": ("Run length if sites were independent", "sites"),
    "run_length_ratio": ("Run length / independent sites", "ratio (1 = independent sites)"),
    "persistence": ("Persistence along the rods", "0 = independent, 1 = never changes"),
    "persistence_per_metal": ("Persistence of each metal", "0 = independent, 1 = never changes"),
    "entropy_rate_bits": ("Entropy rate", "bits per site"),
    "entropy_independent_bits": ("Entropy of independent sites", "bits per site"),
    "rod_to_rod.corr": ("Neighbouring-rod correlation", "correlation at lag 0 (posteriors)"),
    "rod_to_rod.corr_corrected": ("Neighbouring-rod correlation, corrected", "correlation at lag 0"),
    "rod_to_rod.kappa": ("Agreement of neighbouring rods", "Cohen's kappa"),
}


#: unit suffixes of metadata field names and how a figure axis writes them
_UNIT_SUFFIX = {"c": "\u00b0C", "k": "K", "nm": "nm", "um": "\u00b5m", "mm": "mm", "h": "h", "min": "min",
                "s": "s", "pa": "Pa", "kpa": "kPa", "mpa": "MPa", "v": "V", "kv": "kV", "pct": "%",
                "percent": "%", "days": "days", "ml": "mL", "mmol": "mmol"}


def field_label(name: str) -> str:
    """A metadata field name as an axis label: ``synthesis_temperature_c -> 'synthesis temperature (°C)'``.

    A last word that is a unit suffix (``_c``, ``_k``, ``_nm``, ``_h``, ``_s``, ...) becomes the unit
    in parentheses; the other underscores become spaces.
    """
    words = [w for w in str(name).split("_") if w]
    if len(words) > 1 and words[-1].lower() in _UNIT_SUFFIX:
        return " ".join(words[:-1]) + f" ({_UNIT_SUFFIX[words[-1].lower()]})"
    return " ".join(words) or str(name)


def statistic_text(base: str) -> tuple:
    """(title, y-axis label) of a statistic's panel (:data:`STATISTIC_TEXT`, else the key in words)."""
    if base in STATISTIC_TEXT:
        return STATISTIC_TEXT[base]
    words = base.replace(".", " ").replace("_", " ")
    return words[:1].upper() + words[1:], "estimate (see docs/GLOSSARY.md)"


def _x_positions(comp: Comparison):
    """x of every run, whether it has a numeric value, and the x where the runs without one start.

    Runs with a numeric value of the ordering field sit at that value (equal values side by side);
    the others follow to the right, one step apart, in the comparison's order (so "placed last"
    is drawn last); None when every run has a value.
    """
    vals = [order_value(r.metadata.get(comp.order_by)) if comp.order_by else None for r in comp.runs]
    num = [v for v in vals if v is not None]
    lo, hi = (min(num), max(num)) if num else (0.0, 0.0)
    span = (hi - lo) or max(abs(hi), 1.0)
    step = span / max(len(num) - 1, 1) if num else 1.0
    xs, seen = [], {}
    for v in vals:
        if v is not None:
            k = seen.get(v, 0)
            seen[v] = k + 1
            xs.append(v + 0.05 * span * (k - 0.5 * (sum(1 for w in vals if w == v) - 1)))
    start = hi + step if num else 0.0
    rest = [start + i * step for i in range(sum(v is None for v in vals))]
    it = iter(rest)
    x = [xs.pop(0) if v is not None else next(it) for v in vals]
    return np.asarray(x, float), np.array([v is not None for v in vals]), (start if rest else None), step


def _run_key(comp: Comparison, width: int = 70) -> list:
    """Lines of the key under the figure: short id, full run name (wrapped) and its value."""
    import textwrap

    lines = []
    for i, r in enumerate(comp.runs):
        v = r.metadata.get(comp.order_by) if comp.order_by else None
        val = "no value" if v is None else str(_cell(v))
        text = f"R{i + 1}  {r.name}  ({val})"
        lines += textwrap.wrap(text, width, subsequent_indent="      ") or [text]
    return lines


def _draw_panel(ax, comp, base, members, x, has_value, first):
    """One statistic of the comparison figure: estimates with 95 % intervals against x."""
    from ..utils.palette import metal_colour

    for s in members:
        iv = [r.intervals.get(s) or {} for r in comp.runs]
        est, lo, hi = (np.array([d.get(k) if d.get(k) is not None else np.nan for d in iv], float)
                       for k in ("estimate", "low", "high"))
        metal = s.rsplit(".", 1)[-1]
        is_metal = metal in comp.common_metals and s != base
        colour = metal_colour(comp.common_metals.index(metal)) if is_metal else "#000000"
        err = np.nan_to_num(np.vstack([np.clip(est - lo, 0, None), np.clip(hi - est, 0, None)]))
        # runs with a value are joined in order of the value; runs without one are never joined
        ax.errorbar(x[has_value], est[has_value], yerr=err[:, has_value], fmt="o-", color=colour, capsize=3,
                    markersize=4, linewidth=1, label=metal if is_metal else None)
        if (~has_value).any():
            ax.errorbar(x[~has_value], est[~has_value], yerr=err[:, ~has_value], fmt="s", color=colour,
                        capsize=3, markersize=4, mfc="white")
        if first:  # run ids beside the points; close neighbours alternate above and below
            near = 0.06 * (np.ptp(x) or 1.0)
            prev, up = None, True
            for i in sorted(np.flatnonzero(np.isfinite(est)), key=lambda j: x[j]):
                up = not up if prev is not None and x[i] - prev < near else True
                ax.annotate(f"R{i + 1}", (x[i], est[i]), xytext=(3, 3 if up else -9), textcoords="offset points",
                            fontsize=6)
                prev = x[i]
            first = False
    title, ylabel = statistic_text(base)
    ax.set_title(title, fontsize=9)
    ax.set_ylabel(ylabel, fontsize=7)
    if any(m.rsplit(".", 1)[-1] in comp.common_metals and m != base for m in members):
        ax.legend(fontsize=7, frameon=False)


def plot_comparison(comp: Comparison, path, statistics=None):
    """Draw :func:`comparison_figure` into ``path`` (``.png`` or ``.svg``, with probeseq's mark); return ``path``."""
    import matplotlib.pyplot as plt

    from ..utils.marks import figure_metadata

    fig = comparison_figure(comp, statistics)
    fig.savefig(path, dpi=150, metadata=figure_metadata(path))
    plt.close(fig)
    return path


def comparison_figure(comp: Comparison, statistics=None):
    """Key statistics against the ordering field, with 95 % bootstrap intervals as error bars.

    Runs with a numeric value of the ordering field are drawn at that value and joined by a line
    in that order; runs without one (or with text) follow to the right of a dashed line, marked
    by open squares and never joined. Every run carries a short id (R1, R2, ...) that the key
    under the panels gives with its full name and value; panels have readable titles and y-axis
    labels with their unit or meaning, and the x axis names the field with its unit
    (``synthesis_temperature_c`` -> "synthesis temperature (°C)").

    Parameters
    ----------
    comp : Comparison
    statistics : sequence of str, optional
        Statistic names to draw (default: those of :data:`KEY_STATISTICS` the runs share).

    Returns
    -------
    matplotlib.figure.Figure
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    stats = statistics or [s for s in comp.statistics
                           if any(s.startswith(k) if k.endswith(".") else s == k for k in KEY_STATISTICS)]
    groups = {}
    for s in stats:
        base = s.rsplit(".", 1)[0] if s.rsplit(".", 1)[-1] in comp.common_metals else s
        groups.setdefault(base, []).append(s)

    def rank(base):  # panels in the order of KEY_STATISTICS, others after
        keys = [k.rstrip(".") for k in KEY_STATISTICS]
        return keys.index(base) if base in keys else len(keys)

    groups = dict(sorted(groups.items(), key=lambda kv: rank(kv[0])))
    n = max(1, len(groups))
    x, has_value, start, step = _x_positions(comp)
    key = _run_key(comp)
    ncol = 1 + (len(key) - 1) // 14
    rows = -(-len(key) // ncol)
    key_in = 0.16 * rows + 0.25
    fig, axes = plt.subplots(1, n, figsize=(3.3 * n, 2.9 + key_in), squeeze=False)
    for i, (ax, (base, members)) in enumerate(zip(axes[0], groups.items())):
        _draw_panel(ax, comp, base, members, x, has_value, first=i == 0)
        if start is not None and has_value.any():
            ax.axvline(start - 0.5 * step, color="0.6", linestyle="--", linewidth=0.8)
        numeric = comp.order_by and has_value.any()
        ax.set_xlabel(field_label(comp.order_by) if numeric else "run (key below)", fontsize=8)
        if not has_value.all():  # the runs without a value are named by their ids
            x0, x1 = ax.get_xlim()
            ticks = [t for t in ax.get_xticks() if x0 <= t <= x1 and t < start - 0.5 * step] if has_value.any() else []
            ids = [(x[j], f"R{j + 1}\nno value" if has_value.any() else f"R{j + 1}") for j in np.flatnonzero(~has_value)]
            ax.set_xticks(list(ticks) + [t for t, _ in ids],
                          [f"{t:g}" for t in ticks] + [lab for _, lab in ids])
        ax.tick_params(labelsize=7)
    for c in range(ncol):
        fig.text(0.01 + c / ncol, key_in / (2.9 + key_in) - 0.02, "\n".join(key[c * rows:(c + 1) * rows]),
                 fontsize=6.5, va="top", ha="left", family="monospace")
    fig.tight_layout(rect=(0, key_in / (2.9 + key_in), 1, 1))
    return fig
