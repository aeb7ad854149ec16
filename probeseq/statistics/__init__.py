"""Statistics of decoded sequences: Markov-chain statistics (:mod:`.markov`), runs and the runs
test (:mod:`.runs`), agreement between rods (:mod:`.agreement`, its circular-shift null in
:mod:`.shiftnull`), the statistics of one run (:mod:`.summary`) and the classification of the
arrangement (:mod:`.classify`).
"""
