"""The words of an analysis's outputs, written once: the one warnings list, the note on synthetic
input, the figure titles and captions, the run-length and composition explanations, the cautions.

* **One warnings list.** :func:`analysis_warnings` builds the warnings of an analysis once, when the
  analysis ends (:func:`probeseq.pipeline.analysis.analyze`); they are ``AnalysisResult.warnings``,
  which the terminal summary prints, ``results.json`` stores under ``warnings`` and the report
  lists. The report adds only what happens while it is written (a figure that cannot be drawn),
  and ``write_analysis`` writes those into ``results.json`` too.
* **Synthetic input says so.** A run whose ``run.toml`` has ``[sample] synthetic = true`` (the
  bundled sample runs) carries :func:`synthetic_note` first in that list, and the report shows it
  as a banner above the verdict.
* **Captions say what is shown and how to read it** (:func:`figure_text`), whoever drew the figure:
  the report's own drawing and the figure files of ``write_analysis`` get the same words.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ['UNCERTAIN_SHARE_WARN', 'FEW_RODS_WARN', 'CAUTIONS', 'LABEL_MEANING', 'CONFIDENCE_MEANING',
           'analysis_warnings', 'synthetic_note', 'is_synthetic', 'unresolvable_warning', 'figure_text',
           'run_length_note', 'em_iterations_text']

#: a warning is added when more than this share of decoded sites is uncertain
UNCERTAIN_SHARE_WARN = 0.25


#: a warning is added when fewer rods than this were decoded
FEW_RODS_WARN = 20


#: the cautions every report carries (the substance of the README's "Cautions and limits")
CAUTIONS = (
    ("What the inference assumes",
     "The rod lattice (cell, rod positions, repeat along the rod, sites per repeat) is taken as known from "
     "crystallography; every site along a rod holds exactly one of the listed metals; and the arrangement is "
     "summarised by one first-order Markov chain shared by all rods of the run. Order such a chain cannot "
     "express (longer-range motifs, gradients with depth, several domains with different order) shows only "
     "through the misfit it causes."),
    ("Atom-probe reconstructions have artefacts",
     "Lateral positions are blurred and distorted (trajectory aberrations, local magnification, uneven "
     "evaporation of metal and linker); the depth scale depends on the reconstruction parameters; and the "
     "detection efficiency is well below one, so many sites leave no ion. Molecular ions may dissociate and "
     "peaks of different species may overlap in mass-to-charge. Check the registration (density figure) and "
     "the ranging (spectrum figure) before trusting a sequence."),
    ("Results are statistical",
     "Labels such as 'long-block' are inferences from a model, with the error rates and confidence stated "
     "here, not direct observations of the metal at every site. A chemical conclusion (for example that a "
     "synthesis condition causes segregation) needs supporting evidence from other methods (diffraction, "
     "spectroscopy, several specimens)."),
)


CONFIDENCE_MEANING = (
    "The confidence is the probability that the label is right, calibrated on simulated runs of every "
    "arrangement: {share:.0f} % of bootstrap resamples over rods gave the same label, and on simulated runs "
    "labels with that agreement were right this often. It holds for data like the simulations (the model's "
    "assumptions, similar sizes and efficiencies); it says nothing about artefacts the model leaves out.")


LABEL_MEANING = {
    "random": "no memory along the rods: the metal at a site does not depend on the metal next to it "
              "(the independent-sites model is not rejected).",
    "short-repeat": "neighbouring sites along a rod are correlated, but runs of the least abundant metal are "
                    "shorter than {lb:g} sites on average.",
    "long-block": "the metals form long blocks along the rods: runs of the least abundant metal average "
                  "{lb:g} sites or more.",
    "interspersed": "the least abundant metal sits as isolated units (or very short stretches) between runs of "
                    "the others: it follows itself significantly less often than independent sites would.",
    "rod-to-rod-copied": "neighbouring rods carry the same sequence, more than crosstalk between rods explains.",
    "undetermined": "the data do not support a class (too few rods, sites or sites of the least abundant metal, "
                    "or no usable test result); no guess is made.",
}


# ---------------------------------------------------------------------------------- warnings
def is_synthetic(provenance) -> bool:
    """Whether the run description marks the input as synthetic (``[sample] synthetic = true``)."""
    sample = (provenance or {}).get("sample") or {}
    return isinstance(sample, dict) and sample.get("synthetic") is True


def synthetic_note(provenance) -> str | None:
    """The note that the input is synthetic, or None when nothing marks it so.

    Parameters
    ----------
    provenance : dict
        The analysis's provenance; ``sample`` is the run description's ``[sample]`` table.
    """
    if not is_synthetic(provenance):
        return None
    return ("synthetic data: the run description marks this input as simulated ([sample] synthetic = true in "
            "run.toml); these results describe a simulation, not a measurement")


def unresolvable_warning(misassigned_fraction: float) -> str:
    """The warning that single rods are not resolvable (misassigned fraction: share of a rod's ions)."""
    return (f"single rods are not resolvable (misassigned fraction {misassigned_fraction:.2f}: share of a rod's "
            "ions expected nearer another rod); per-rod sequences are unreliable, see the groups-of-rods analysis")


def analysis_warnings(columns, decoded, groups=None, caught=(), provenance=None) -> list:
    """The one warnings list of an analysis (terminal, ``results.json`` and report).

    Parameters
    ----------
    columns : RodColumns
    decoded : DecodeResult
    groups : GroupResult, optional
        The groups-of-rods analysis; its notes are added as "groups of rods: ...".
    caught : sequence of str
        Warnings raised while the stages ran (first line of each).
    provenance : dict, optional
        Marks synthetic input (:func:`synthetic_note`).

    Returns
    -------
    list of str
        One line each, without repeats: the synthetic note first, then single rods not
        resolvable, the stages' warnings, the share of uncertain sites when it is over
        :data:`UNCERTAIN_SHARE_WARN`, and too few decoded rods (under :data:`FEW_RODS_WARN`).
    """
    out = [str(w) for w in caught] + [str(w) for w in getattr(decoded, "warnings", ()) or ()]
    if not columns.resolvable and not any("not resolvable" in w for w in out):
        out.insert(0, unresolvable_warning(float(columns.misassigned_fraction)))
    note = synthetic_note(provenance)
    if note:
        out.insert(0, note)
    n_obs = max(int(getattr(decoded, "n_obs", 0) or columns.mask.sum()), 1)
    share = float(np.asarray(decoded.uncertain).sum()) / n_obs
    if share > UNCERTAIN_SHARE_WARN:
        out.append(f"{100 * share:.0f} % of decoded sites are uncertain (best posterior below "
                   f"{float(decoded.uncertain_below):g}; more than {100 * UNCERTAIN_SHARE_WARN:.0f} %): low counts "
                   "per site make single-site sequences unreliable")
    n_used = int(columns.mask.any(axis=1).sum())
    if n_used < FEW_RODS_WARN:
        out.append(f"only {n_used} rods have decoded sites (fewer than {FEW_RODS_WARN}): bootstrap intervals over "
                   "rods are rough")
    if groups is not None:
        out += [f"groups of rods: {w}" for w in getattr(groups, "warnings", ()) or () if str(w) not in out]
    return list(dict.fromkeys(out))


# ---------------------------------------------------------------------------------- explanations
def em_iterations_text(dec) -> str:
    """How the decoder's parameters were obtained, truthfully (EM iterations of each phase).

    ``fit_decoder`` screens several starts (a few EM iterations each, on a subset of at most
    ``SCREEN_SITES`` sites, or on every site of a small run) and continues the best one on all
    sites until the log-likelihood settles; when the screening already ran on every site, that
    continuation often needs a single iteration. Parameters given to ``decode`` are not fitted.
    """
    n_starts = int(np.size(getattr(dec, "start_logliks", ())))
    if n_starts == 0 and int(dec.n_iter) == 0:
        return "parameters given, not fitted"
    n_screen = int(getattr(dec, "n_iter_screening", 0) or 0)
    n_obs = int(dec.n_obs)
    n_obs_screen = int(getattr(dec, "n_obs_screening", 0) or 0)
    where = "all sites" if n_obs_screen >= n_obs else f"a subset of {n_obs_screen} sites"
    conv = "converged" if dec.converged else "not converged: stopped at the iteration limit"
    return (f"{n_screen + int(dec.n_iter)} in all: {n_screen} screening the best of {n_starts} starts on {where}, "
            f"then {int(dec.n_iter)} on all {n_obs} sites ({conv})")


def run_length_note(result) -> str:
    """The report's paragraph on which mean run length is the headline, with the decoded runs' mean."""
    d = result.decoded.to_dict().get("mean_decoded_run_length_sites") or {}
    parts = [f"{m} {float(v):.1f}" for m, v in d.items() if v is not None and math.isfinite(float(v))]
    decoded = (f" The runs listed in runs.csv (the decoded paths) average {', '.join(parts)} sites "
               "(results.json decoding.mean_decoded_run_length_sites): runs cut by a rod end or the mask are "
               "included there and a decoding error splits a run, so that mean is shorter.") if parts else ""
    return ("Mean run length: the headline number (results.json statistics.mean_run_length_sites; the terminal "
            "and the classification use it) is 1 / (1 - P_kk) of the fitted transition matrix P, the mean stay "
            "of the fitted chain in metal k, which rod ends, masked sites and decoding errors do not shorten."
            + decoded)


# ---------------------------------------------------------------------------------- figures
def figure_text(name: str, result=None) -> tuple:
    """(title, caption) of a standard figure of the report; (name as words, "") for another name.

    Parameters
    ----------
    name : str
        ``tracks``, ``spectrum``, ``density``, ``run_lengths``, ``rod_to_rod``, ``groups``,
        ``overlaps`` or ``reconstruction``.
    result : AnalysisResult, optional
        Fills in numbers (the long-block threshold, the reference depth of the density figure).
    """
    lb, z_ref = 8.0, None
    if result is not None:
        cl = result.classification
        lb = float((cl.thresholds or {}).get("long_block_sites", getattr(result.options, "long_block_sites", 8)))
        z_ref = float(getattr(result.columns, "z_ref_nm", float("nan")))
    zr = f"{z_ref:.1f} nm" if z_ref is not None and math.isfinite(z_ref) else "(not recorded)"
    texts = {
        "tracks": ("Sequence tracks",
                   "Decoded metal at each site of a patch of neighbouring rods (one rod per horizontal track, depth "
                   "along the track; lateral neighbours on adjacent tracks). Colour = most probable metal; the "
                   "lighter, the lower its posterior probability p; blank = no ion detected and the posterior stays "
                   "at the prior (the data say nothing there); hatched = outside the analysed volume. Long "
                   "single-colour stretches are runs; read their length against the run-length figure."),
        "spectrum": ("Mass spectrum with ranges",
                     "Counts per mass-to-charge bin (log scale) with the ranges shaded: a metal's colour for "
                     "ranges counted in that metal's channel, grey with an outline for other species (linker "
                     "fragments, hydrogen, oxygen). Each label names the ions of its range; where labels would "
                     "overlap they are stacked higher with a thin leader line to their peak, and the labels of "
                     "minor peaks that still do not fit are left out (their band stays shaded). '?' marks peaks "
                     "no species explains: check them before trusting the composition."),
        "overlaps": ("Overlapped metal and fragment lines",
                     "The spectrum near each range where a metal line and a fragment line coincide (log scale; "
                     "the range shaded), with the fitted ions of each species in it. Their split was refitted "
                     "from the ions' mass-to-charge and their distance to the rod axes (metal ions sit on the axes, "
                     "fragments between): the metal share from space is given beside the share the spectrum alone "
                     "would give."),
        "reconstruction": ("The reconstruction calibrated on the lattice",
                           "Left: the site pitch measured along depth (the file's depth per crystal pitch; points: "
                           "depth windows, line and band: the smooth fit with two standard errors) against the "
                           "lattice's pitch, dashed; the sites are cut in the calibrated depth. Middle: the phase of "
                           "the site planes left after calibration across the field of view, in pitches (flat "
                           "planes give 0 everywhere). Right: the lateral scale refitted per depth slab (a drifting "
                           "magnification). Far right, when present: the detection efficiency against the distance "
                           "from the specimen axis that the decoder used. The calibration assumes the lattice's "
                           "repeat is right: a wrong repeat would be read as a depth scale error."),
        "density": ("Metal density with the fitted rod lattice",
                    "Metal ions seen down the rods: every ion is moved along the fitted rod direction to the "
                    f"reference depth z_ref = {zr} (the axes are x and y at that depth, nm), so each rod is one "
                    "spot. Colour: metal ions per nm\u00b2 of the cross-section, summed over the whole depth (square-root "
                    "scale, so faint spots show). "
                    "Circles: the registered rod axes (vermillion: rods decoded, holding at least one metal ion in "
                    "their used sites; grey: rods with no used site or no ion there, left out). Spots centred in "
                    "the circles mean the registration holds; rods at the edge cross the analysed volume over "
                    "part of the depth only, so their spots are faint."),
        "run_lengths": ("Run lengths along the rods",
                        "Share of decoded runs longer than l sites (Kaplan-Meier, runs cut by a rod end or the mask "
                        "counted as censored), against the geometric law of independent sites of the same "
                        "composition (dashed) and of the fitted chain (solid). A curve above the dashed line means "
                        f"longer runs than chance. The long-block threshold is {lb:g} sites."),
        "rod_to_rod": ("Rod-to-rod agreement against its null",
                       "Top: the test statistic (largest correlation of neighbouring rods over small depth lags) in "
                       "null replicates where one rod of each pair is circularly shifted, and the observed value; "
                       "an observed value inside the null histogram means no copying. Bottom: the correlation at "
                       "each lag, on the posteriors and corrected for decoding noise."),
        "groups": ("Groups of rods: variance against group size",
                   "Variance of the metal fraction of groups of n neighbouring rods. Independent rods fall as 1/n "
                   "(dashed); copied rods keep their variance. The fit gives the rod-to-rod correlation \u03c1."),
    }
    if name in texts:
        return texts[name]
    return name.replace("_", " ").capitalize(), ""
