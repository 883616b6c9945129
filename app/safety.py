"""The safety caution shown in the README, on loop pages and in every export manifest.

It lives in a neutral module so that store and export code can quote it without importing the
page templates.
"""

from __future__ import annotations

SAFETY_CAUTION = (
    "Data from this service trains policies that move machines near people. Labels and reports "
    "here are evidence for engineers, not a safety case: deployment decisions follow the "
    "applicable safety standards and local regulations, and the judgement of qualified safety "
    "engineers."
)
