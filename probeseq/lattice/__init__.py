"""The lattice and the rods: lattice description and presets (:mod:`.model`), registration of
the lattice on the ions (:mod:`.registration`, with its Fourier search in :mod:`.fourier` and
the nearest-rod search in :mod:`.locator`), the rod columns inside the specimen
(:mod:`.geometry`), binning ions into rod sites (:mod:`.columns`, and the fused counting pass in
:mod:`.counting`), the counts object :class:`~probeseq.lattice.rodcolumns.RodColumns`
(:mod:`.rodcolumns`) and the density figure (:mod:`.plot`).
"""
