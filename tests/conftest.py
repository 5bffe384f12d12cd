import os

import matplotlib
import numpy as np
import pytest

matplotlib.use("Agg")
os.environ.setdefault("PYTHONHASHSEED", "0")


@pytest.fixture
def rng():
    return np.random.default_rng(20261202)
