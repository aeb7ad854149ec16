"""Compare analysed runs: a table of statistics with intervals, ordered by a metadata field, and
bootstrap tests of whether two runs differ.

Each run is an ``analyze`` output folder (``results.json`` plus ``bootstrap.h5``). Metadata fields
are the ``[sample]`` entries of the run description (for example ``synthesis_temperature_c``).

The test of a difference between runs A and B for a statistic s uses the two independent bootstrap
distributions over rods: the replicates of ``s_A - s_B`` (paired at random, each run's resamples
being independent of the other's) approximate the sampling distribution of the difference; the
two-sided p-value is ``2 min(P(d <= 0), P(d >= 0))`` with the usual +1 correction, and the 95 %
interval of the difference is its percentile interval (Efron & Tibshirani 1993, ch. 13 and 16,
recalled from memory).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..exceptions import DataQualityWarning, InputError
from ..utils.marks import finite_or_none
from ..utils.tomlfile import short_repr

__all__ = ['RunRecord', 'Comparison', 'load_runs', 'compare_runs', 'difference_test', 'order_value', 'KEY_STATISTICS']

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


def difference_test(rep_a, rep_b, random_state=None):
    """Bootstrap test of ``a - b``: (difference interval low, high, two-sided p).

    Parameters
    ----------
    rep_a, rep_b : 1-D arrays
        Bootstrap replicates of the statistic in the two runs (independent resamples).
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
                diffs.append({"run_a": a.name, "run_b": b.name, "statistic": s,
                              "difference": None if ea is None or eb is None else ea - eb,
                              "low": lo, "high": hi, "p_value": p})
    return Comparison(runs=tuple(recs), order_by=order_by, statistics=tuple(keep), common_metals=tuple(sorted(common)),
                      differences=tuple(diffs), notes=tuple(notes))


def plot_comparison(comp: Comparison, path, statistics=None):
    """Key statistics against the ordering field, with 95 % bootstrap intervals as error bars."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from ..utils.palette import metal_colour

    stats = statistics or [s for s in comp.statistics
                           if any(s.startswith(k) if k.endswith(".") else s == k for k in KEY_STATISTICS)]
    groups = {}
    for s in stats:
        base = s.rsplit(".", 1)[0] if s.rsplit(".", 1)[-1] in comp.common_metals else s
        groups.setdefault(base, []).append(s)
    n = max(1, len(groups))
    fig, axes = plt.subplots(1, n, figsize=(3.2 * n, 2.8), squeeze=False)
    xs = []
    for i, r in enumerate(comp.runs):
        v = order_value(r.metadata.get(comp.order_by)) if comp.order_by else None
        xs.append(float(i) if v is None else v)
    numeric = comp.order_by and all(order_value(r.metadata.get(comp.order_by)) is not None for r in comp.runs)
    for ax, (base, members) in zip(axes[0], groups.items()):
        for j, s in enumerate(members):
            est = np.array([(r.intervals.get(s) or {}).get("estimate", np.nan) or np.nan for r in comp.runs], float)
            lo = np.array([(r.intervals.get(s) or {}).get("low", np.nan) or np.nan for r in comp.runs], float)
            hi = np.array([(r.intervals.get(s) or {}).get("high", np.nan) or np.nan for r in comp.runs], float)
            metal = s.rsplit(".", 1)[-1]
            colour = metal_colour(comp.common_metals.index(metal)) if metal in comp.common_metals else "#000000"
            err = np.vstack([np.clip(est - lo, 0, None), np.clip(hi - est, 0, None)])
            ax.errorbar(xs, est, yerr=np.nan_to_num(err), fmt="o-", color=colour, capsize=3, label=metal
                        if metal in comp.common_metals else None)
        ax.set_title(base.replace("_", " "), fontsize=9)
        if any(m.rsplit(".", 1)[-1] in comp.common_metals for m in members):
            ax.legend(fontsize=7, frameon=False)
        ax.set_xlabel(comp.order_by.replace("_", " ") if numeric else "run", fontsize=8)
        if not numeric:
            ax.set_xticks(xs, [r.name for r in comp.runs], rotation=30, fontsize=7)
        ax.tick_params(labelsize=7)
    fig.tight_layout()
    from ..utils.marks import figure_metadata

    fig.savefig(path, dpi=150, metadata=figure_metadata(path))
    plt.close(fig)
    return path
