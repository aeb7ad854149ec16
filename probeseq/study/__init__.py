"""Many runs: run folders and their ``run.toml`` (:mod:`.runinfo`), batches of runs
(:mod:`.batch`), comparison of finished analyses (:mod:`.compare`) and planning how many runs a
question needs (:mod:`.plan`).
"""
