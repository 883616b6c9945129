"""Sign-in throttling: failed attempts counted per user name and per client address.

Kept in the memory of each server process (a restart forgets them; with N processes a guesser
gets up to N times the attempts). Bounded: at most MAX_TRACKED names and addresses each, the
stalest forgotten first.
"""

from __future__ import annotations

import math
import threading
import time
from collections import OrderedDict, deque
from collections.abc import Callable
from dataclasses import dataclass

MAX_TRACKED = 10_000


@dataclass(frozen=True)
class Limits:
    """Failed attempts allowed within `window_s` seconds, per name and per address."""

    per_name: int
    per_address: int
    window_s: float


class _Failures:
    """Times of recent failures per key, oldest key first."""

    def __init__(self, limit: int, window_s: float) -> None:
        self.limit = limit
        self.window_s = window_s
        self.by_key: OrderedDict[str, deque[float]] = OrderedDict()

    def _recent(self, key: str, now: float) -> deque[float]:
        times = self.by_key.get(key)
        if times is None:
            return deque()
        while times and times[0] <= now - self.window_s:
            times.popleft()
        if not times:
            del self.by_key[key]
        return times

    def wait_s(self, key: str, now: float) -> float:
        """Seconds until `key` may try again; 0 when it may now."""
        times = self._recent(key, now)
        if len(times) < self.limit:
            return 0.0
        return times[len(times) - self.limit] + self.window_s - now

    def add(self, key: str, now: float) -> None:
        times = self._recent(key, now)
        times.append(now)
        self.by_key[key] = times
        self.by_key.move_to_end(key)
        while len(times) > self.limit:
            times.popleft()
        while len(self.by_key) > MAX_TRACKED:
            self.by_key.popitem(last=False)

    def clear(self, key: str) -> None:
        self.by_key.pop(key, None)


class SignInThrottle:
    """Refuses a sign-in while its name or its address has used up its failed attempts."""

    def __init__(self, limits: Limits, clock: Callable[[], float] = time.monotonic) -> None:
        self.names = _Failures(limits.per_name, limits.window_s)
        self.addresses = _Failures(limits.per_address, limits.window_s)
        self.clock = clock
        self.lock = threading.Lock()

    @staticmethod
    def _name_key(name: str) -> str:
        return name.casefold()[:200]

    def retry_after_s(self, *, name: str, address: str) -> int:
        """Whole seconds to wait before trying again (0: go ahead)."""
        now = self.clock()
        with self.lock:
            wait = max(
                self.names.wait_s(self._name_key(name), now),
                self.addresses.wait_s(address, now),
            )
        return math.ceil(wait) if wait > 0 else 0

    def failed(self, *, name: str, address: str) -> None:
        """Count a failed attempt against the name and the address."""
        now = self.clock()
        with self.lock:
            self.names.add(self._name_key(name), now)
            self.addresses.add(address, now)

    def succeeded(self, *, name: str) -> None:
        """A right password clears the name's failures (not the address's)."""
        with self.lock:
            self.names.clear(self._name_key(name))
