"""Ranging: from mass-to-charge to species. Isotope patterns (:mod:`.isotopes`), the spectrum
and its peaks (:mod:`.spectrum`), ranges and their TOML layout (:mod:`.ranges`), calibration
(:mod:`.calibration`), the automatic fit of ranges and composition (:mod:`.auto`), the channel of
each ion (:mod:`.channels`) and the ranging figure (:mod:`.plot`).
"""
