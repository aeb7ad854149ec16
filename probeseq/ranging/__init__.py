"""Ranging: from mass-to-charge to species. Isotope patterns (:mod:`.isotopes`), the spectrum
and its peaks (:mod:`.spectrum`), ranges and their TOML layout (:mod:`.ranges`), calibration
(:mod:`.calibration`), the automatic fit of ranges and composition (:mod:`.auto`, its amounts fit in
:mod:`.amounts`), the refit of overlapped metal and fragment lines with the ions' distance to the
rod axes (:mod:`.spatial`), the channel of each ion (:mod:`.channels`) and the ranging figures
(:mod:`.plot`).
"""
