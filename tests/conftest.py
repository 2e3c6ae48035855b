"""Test-suite configuration: deterministic property tests, so CI is reproducible."""

from hypothesis import settings

settings.register_profile("coastmon", derandomize=True, deadline=None, print_blob=True)
settings.load_profile("coastmon")
