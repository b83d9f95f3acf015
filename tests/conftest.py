import numpy as np
import pytest


@pytest.fixture
def rng():
    """A seeded Generator per test (never the global np.random state)."""
    return np.random.default_rng(20261202)
