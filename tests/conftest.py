"""Test-suite settings shared by every test file."""

import pytest
from hypothesis import settings

# Property tests draw their examples from a fixed seed: the suite gives the same verdict on every
# run and every machine (a failure found once is found again). Explore new examples locally with
# `pytest --hypothesis-profile=explore`.
settings.register_profile("ci", derandomize=True, print_blob=True)
settings.register_profile("explore", derandomize=False)
settings.load_profile("ci")


@pytest.fixture
def firmware():
    """start(kind, optics, **kw) -> a firmware simulator on a pseudo-terminal, stopped after the test."""
    from maskrun.simulators.firmware import start_firmware

    handles = []

    def start(*args, **kw):
        h = start_firmware(*args, **kw)
        handles.append(h)
        return h

    yield start
    for h in handles:
        h.stop()
