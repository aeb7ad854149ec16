import os

import numpy as np
import pytest


@pytest.fixture
def rng():
    """Seeded generator; the seed is printed so a failure can be replayed (PROBESEQ_TEST_SEED)."""
    seed = int(os.environ.get("PROBESEQ_TEST_SEED", "12345"))
    print(f"test seed {seed}")
    return np.random.default_rng(seed)


@pytest.fixture(scope="session")
def small_run():
    """A small simulated long-block run shared by several test modules."""
    from probeseq.simulation.simulate import simulate_run

    return simulate_run(pattern="long-block", top_radius_nm=5.0, depth_nm=15.0, seed=7)
