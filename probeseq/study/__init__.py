"""Many runs: run folders and their ``run.toml`` (:mod:`.runinfo`), batches of runs
(:mod:`.batch`; one task per run on a dask cluster or in local processes: :mod:`.cluster`),
comparison of finished analyses (:mod:`.compare`) and planning how many runs a question needs
(:mod:`.plan`).
"""
