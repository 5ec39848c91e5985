"""clearaudit: overhead power line audits from airborne laser scans.

Results support, and do not replace, a licensed engineer's judgment and the
local code; clearance rule values must be verified against the code in force.
"""
from __future__ import annotations

import logging

__version__ = "0.1.0"

CAUTION = (
    "Results support, and do not replace, a licensed engineer's judgment and the local code. "
    "Clearance rule values must be verified against the code in force."
)

logging.getLogger(__name__).addHandler(logging.NullHandler())

__all__ = ["__version__", "CAUTION"]
