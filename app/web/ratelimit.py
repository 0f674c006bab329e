"""Sign-in rate limit: failed attempts per (address, name) and per address.

In-memory and per server process (the embedded deployment runs one).
"""

from __future__ import annotations

import os
import threading
import time
from collections import deque


class RateLimited(Exception):  # noqa: N818 - reads as a state, like "Forbidden"
    """Too many failed sign-ins; ``retry_after`` is in seconds."""

    def __init__(self, retry_after: int) -> None:
        super().__init__(f"Too many failed sign-ins. Try again in {retry_after} s.")
        self.retry_after = retry_after


class LoginLimiter:
    """Sliding-window counter of failed sign-ins.

    Parameters
    ----------
    max_failures : int
        Failures allowed per (address, name) within ``window`` seconds; an
        address alone gets five times as many across names.
    window : float
        Seconds.
    """

    def __init__(self, max_failures: int | None = None, window: float | None = None) -> None:
        self.max_failures = max_failures or int(os.environ.get("RAWPROOF_LOGIN_MAX_FAILURES", 8))
        self.window = window or float(os.environ.get("RAWPROOF_LOGIN_WINDOW", 600))
        self._events: dict[tuple[str, str], deque[float]] = {}
        self._lock = threading.Lock()

    def _recent(self, key: tuple[str, str], now: float) -> deque[float]:
        q = self._events.setdefault(key, deque())
        while q and q[0] <= now - self.window:
            q.popleft()
        return q

    def check(self, address: str, name: str) -> None:
        """Raise :class:`RateLimited` when this address or (address, name) is over its budget."""
        now = time.monotonic()
        with self._lock:
            for key, limit in (((address, name.lower()), self.max_failures),
                               ((address, ""), self.max_failures * 5)):
                q = self._recent(key, now)
                if len(q) >= limit:
                    raise RateLimited(int(q[0] + self.window - now) + 1)

    def failed(self, address: str, name: str) -> None:
        now = time.monotonic()
        with self._lock:
            self._recent((address, name.lower()), now).append(now)
            self._recent((address, ""), now).append(now)

    def succeeded(self, address: str, name: str) -> None:
        with self._lock:
            self._events.pop((address, name.lower()), None)
