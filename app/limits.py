"""One set of limits for everything a client sends: integer ranges of the store's columns, the
characters a name may hold, and how much of a bad value an error message repeats.

Checked before anything reaches the store, so that SQLite and PostgreSQL give the same answer:
PostgreSQL refuses an integer beyond its column type and a NUL character in text, SQLite stores
both. Nothing here imports the rest of the application.
"""

from __future__ import annotations

import re
import unicodedata
from datetime import UTC, datetime
from typing import Annotated

from fastapi import Path, Query
from pydantic import AfterValidator, BaseModel, ConfigDict

# Integer columns: INTEGER on both backends is 32-bit on PostgreSQL; BIGINT and SQLite's
# INTEGER are 64-bit.
INT32_MAX = 2**31 - 1
INT64_MAX = 2**63 - 1

# Text the store keeps in String(200) columns: rollout keys and robot names.
KEY_MAX_CHARS = 200
# How much of a client's value an error message repeats (the rest is cut and marked with "…").
SHOWN_MAX_CHARS = 80

# Characters refused in names: C0 and C1 controls (NUL included), line and paragraph separators,
# and the Unicode bidirectional controls that make text display in another order than it is
# stored (docs/references.md, "Hostile input").
FORBIDDEN_CHARACTERS = (
    "\x00-\x1f\x7f-\x9f\u2028\u2029\u200e\u200f\u061c\u202a-\u202e\u2066-\u2069\ufeff"
)
_FORBIDDEN = re.compile(f"[{FORBIDDEN_CHARACTERS}]")

# Path and query parameters, declared with their ranges so that the schema says them and an
# out-of-range number is a 422 before any query runs.
RoundNumber = Annotated[int, Path(ge=0, le=INT32_MAX, description="Round number.")]
RowId = Annotated[int, Path(ge=1, le=INT32_MAX, description="Row id.")]
StepId = Annotated[int, Path(ge=1, le=INT64_MAX, description="Step id.")]
PageOffset = Annotated[int, Query(ge=0, le=INT32_MAX)]


def shown(value: object, limit: int = SHOWN_MAX_CHARS) -> str:
    """A client's value as an error message may repeat it: at most `limit` characters, control
    characters written as escapes, a cut marked with "…"."""
    text = value if isinstance(value, str) else repr(value)
    text = _FORBIDDEN.sub(lambda m: m.group().encode("unicode_escape").decode("ascii"), text)
    return text if len(text) <= limit else text[: limit - 1] + "…"


def name_problem(value: str, *, max_chars: int = KEY_MAX_CHARS, slash: bool = True) -> str | None:
    """Why a name (rollout key, robot, user name) is refused, or None when it is fine.

    A name must be 1 to `max_chars` characters in Unicode normal form C, hold no control or
    bidirectional-control character, not be only white space, and (unless `slash`) no '/'.
    """
    if not value or not value.strip():
        return "is empty or only white space"
    if len(value) > max_chars:
        return f"is {len(value)} characters long; at most {max_chars} are allowed"
    found = _FORBIDDEN.search(value)
    if found:
        code = f"U+{ord(found.group()):04X}"
        return f"holds the control character {code} at position {found.start() + 1}"
    if not unicodedata.is_normalized("NFC", value):
        return "is not in Unicode normal form C (NFC); normalise it before sending"
    if not slash and "/" in value:
        return "holds '/', which cannot appear in an address; use another separator"
    return None


def _plain(value: str) -> str:
    found = _FORBIDDEN.search(value)
    if found:
        raise ValueError(f"holds the control character U+{ord(found.group()):04X}")
    return value


# Free text a client sends in a request body (titles, units, versions): no control characters,
# which PostgreSQL would refuse (NUL) and pages would show garbled.
PlainText = Annotated[str, AfterValidator(_plain)]


class RequestBody(BaseModel):
    """Base of every JSON request body: strict types (no "10" for 10, no false for 0), finite
    numbers only (JSON's non-standard Infinity and NaN are refused), no unknown fields."""

    model_config = ConfigDict(strict=True, allow_inf_nan=False, extra="forbid")


def _as_utc(moment: datetime) -> datetime:
    # a timestamp in an answer always carries its zone (stored ones are UTC already)
    return moment if moment.tzinfo else moment.replace(tzinfo=UTC)


# A timestamp in an answer: always with its zone, whichever backend it was read from.
UtcDatetime = Annotated[datetime, AfterValidator(_as_utc)]
