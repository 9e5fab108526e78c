import numpy as np
import pytest


@pytest.fixture
def rng():
    """A fresh seeded generator per test (no global seeds)."""
    return np.random.default_rng(20261202)
