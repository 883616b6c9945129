"""Who a credential belongs to, kept for a short while in each app process.

Every request used to look its API token or session cookie up in the store. Now an answer is
kept for up to CACHE_SECONDS, tagged with the access version read just before it
(app/auth/access_version.py). A kept answer is used only while the store's version is still the
same, and the store bumps the version with every change of users, tokens or sessions, so a
revocation, a deactivation, a role change or a sign-out in any process counts from the next
request on, everywhere. The time limit bounds what a change the triggers cannot see (a restored
backup, say) could leave behind, and how long an unused entry stays in memory.

Only answers for live credentials are kept (an unknown token costs a lookup every time, so
guessing cannot fill the cache), keyed by the SHA-256 of the secret, never the secret itself.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass

CACHE_SECONDS = 30.0
MAX_ENTRIES = 10_000


@dataclass(frozen=True, slots=True)
class Identity:
    """A user as a request sees it: read-only, safe to share between requests."""

    id: int
    name: str
    roles: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class Known:
    """A credential's owner as read from the store at access version `version`."""

    identity: Identity
    version: int
    read_at: float  # the cache's clock
    csrf_token: str | None = None  # browser sessions only
    expires_at: float | None = None  # browser sessions only: Unix time the session ends


class IdentityCache:
    """A bounded map from credential hash to Known, entries living at most `ttl_s` seconds.

    When full, the entry stored longest ago goes first. Thread-safe.
    """

    def __init__(
        self,
        *,
        ttl_s: float = CACHE_SECONDS,
        max_entries: int = MAX_ENTRIES,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.ttl_s = ttl_s
        self.max_entries = max_entries
        self.clock = clock
        self._entries: dict[str, Known] = {}
        self._lock = threading.Lock()

    def get(self, key: str) -> Known | None:
        """The entry for `key` if it is younger than the time limit."""
        known = self._entries.get(key)
        if known is None or self.clock() - known.read_at >= self.ttl_s:
            return None
        return known

    def put(self, key: str, known: Known) -> None:
        with self._lock:
            self._entries.pop(key, None)  # re-inserted at the end: the newest
            while len(self._entries) >= self.max_entries:
                del self._entries[next(iter(self._entries))]
            self._entries[key] = known

    def drop(self, key: str) -> None:
        with self._lock:
            self._entries.pop(key, None)

    def __len__(self) -> int:
        return len(self._entries)
