"""Shared test set-up: astropy offline, a deterministic hypothesis profile."""

import os

import pytest
from hypothesis import HealthCheck, settings

from phasetag.io.offline import ensure_offline

ensure_offline()

# `ci` is deterministic so that a red run can be reproduced exactly; `dev` explores.
settings.register_profile(
    "ci", derandomize=True, max_examples=60, deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)
settings.register_profile("dev", max_examples=300, deadline=None)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))


@pytest.fixture
def rng():
    import numpy as np

    return np.random.default_rng(20261201)
