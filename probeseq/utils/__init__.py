"""Shared foundations of every stage: checks of values and files (:mod:`.validate`),
bounded TOML reading (:mod:`.tomlfile`), how probeseq marks what it wrote and makes numbers
JSON-safe (:mod:`.marks`), counter-based random numbers per ion (:mod:`.draws`), the one
colour palette (:mod:`.palette`) and numbers as text, p-values at their test's resolution
(:mod:`.textformat`). Nothing here imports a stage.
"""
