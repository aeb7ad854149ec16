"""Hidden-Markov decoding of the metal sequence along each rod: the chain quantities defined once
(:mod:`.chain`), the reference forward-backward, Viterbi and Baum-Welch (:mod:`.hmm`), the
emission model (:mod:`.model`), the fit and decode of all rods (:mod:`.decode`, with the compiled
per-rod passes in :mod:`.rodchain`) and the analysis of groups of rods (:mod:`.groups`).
"""
