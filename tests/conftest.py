import numpy as np
import pytest


@pytest.fixture(scope="session")
def seed():
    """The one seed tests use, so every random number in the suite is reproducible."""
    return 20261201


@pytest.fixture
def rng(seed):
    return np.random.default_rng(seed)
