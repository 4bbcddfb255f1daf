"""Tables shared by the core tests (read once per session from installed packages)."""

import pytest
from sky_fixtures import TARGET

from turnstamp.core.barycentre import BarycentreCalculator
from turnstamp.core.earth import GroundSite
from turnstamp.files.bundled import bundled_leap_seconds, load_earth_orientation, open_ephemeris

# An invented site for the tests (not a real observatory).
TEST_SITE = GroundSite("test ridge", latitude_deg=36.78, longitude_deg=-104.23, height_m=2340.0)


@pytest.fixture(scope="session")
def leaps():
    return bundled_leap_seconds()


@pytest.fixture(scope="session")
def orientation(leaps):
    return load_earth_orientation(leaps=leaps)


@pytest.fixture(scope="session")
def kernel():
    return open_ephemeris()


@pytest.fixture(scope="session")
def site():
    return TEST_SITE


@pytest.fixture(scope="session")
def calculator(site, kernel, orientation):
    """The direct barycentre computation for the test site and the invented target."""
    return BarycentreCalculator(site, TARGET, kernel, orientation)
