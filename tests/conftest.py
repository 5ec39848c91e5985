"""Test-suite settings.

Hypothesis property tests run derandomized: each test draws the same examples on every run
(a seed derived from the test), so CI never fails on a case no earlier run drew; the example
database is off (nothing is written next to the checkout). To draw new cases locally:
``HYPOTHESIS_PROFILE=explore pytest``.
"""
from __future__ import annotations

import os

from hypothesis import settings

settings.register_profile("ci", derandomize=True, database=None)
settings.register_profile("explore", derandomize=False, database=None)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))
