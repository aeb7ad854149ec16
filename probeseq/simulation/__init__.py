"""The forward model: simulated atom-probe runs of a rod framework with a known metal sequence
(:mod:`.simulate`).
"""
