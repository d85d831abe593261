"""Shared test settings."""

import os

from hypothesis import settings

# CI runs property tests derandomised so a red run is reproducible; locally they explore.
settings.register_profile("ci", derandomize=True, deadline=None, print_blob=True)
settings.register_profile("dev", deadline=None)
settings.load_profile("ci" if os.environ.get("CI") else "dev")
