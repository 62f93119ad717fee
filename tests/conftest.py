"""Test-suite settings shared by every test file."""

from hypothesis import settings

# Property tests draw their examples from a fixed seed: the suite gives the same verdict on every
# run and every machine (a failure found once is found again). Explore new examples locally with
# `pytest --hypothesis-profile=explore`.
settings.register_profile("ci", derandomize=True, print_blob=True)
settings.register_profile("explore", derandomize=False)
settings.load_profile("ci")
