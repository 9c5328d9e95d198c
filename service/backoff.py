"""A short back-off for key ids that keep failing their check.

Each wrong secret costs a full scrypt (tens of milliseconds and 16 MiB), so a
flood of them for one key id used to hold the service's worker threads and
slow every caller. After ``threshold`` failures of one id within ``window``
seconds, checks of that id that would need scrypt are refused at once (429 with
Retry-After) for ``first`` seconds, doubling with each further failure up to
``cap``; when a back-off ends, one check is let through and the others wait for
the next. A secret this process has already verified needs no scrypt and is
never held back, so a running client of that key keeps working during a flood.
Unknown ids are counted the same way, so the back-off tells nothing about which
ids exist.
"""

from __future__ import annotations

import threading
import time
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass

from sounding.indexer.errors import AccessError


class TooManyAttempts(AccessError):
    """A key check refused without running it; try again after ``retry_after`` seconds."""

    def __init__(self, message: str, retry_after: float) -> None:
        super().__init__(message)
        self.retry_after = retry_after


@dataclass
class _Record:
    failures: int = 0
    last_failure: float = 0.0
    blocked_until: float = 0.0


class FailureGate:
    """Failure counts per key id, bounded in memory; safe to share between threads."""

    def __init__(
        self,
        threshold: int = 5,
        window: float = 60.0,
        first: float = 1.0,
        cap: float = 5.0,
        max_ids: int = 4096,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.threshold = threshold
        self.window = window
        self.first = first
        self.cap = cap
        self.max_ids = max_ids
        self.clock = clock
        self._lock = threading.Lock()
        self._records: OrderedDict[str, _Record] = OrderedDict()

    def _delay(self, failures: int) -> float:
        return float(min(self.first * 2 ** max(0, failures - self.threshold), self.cap))

    def _current(self, key_id: str, now: float) -> _Record | None:
        record = self._records.get(key_id)
        if record is not None and now - record.last_failure > self.window:
            del self._records[key_id]  # quiet for a whole window: forgiven
            return None
        return record

    def admit(self, key_id: str) -> None:
        """Return if a check of ``key_id`` may run now; TooManyAttempts if not."""
        with self._lock:
            now = self.clock()
            record = self._current(key_id, now)
            if record is None or record.failures < self.threshold:
                return
            if now < record.blocked_until:
                wait = record.blocked_until - now
                raise TooManyAttempts(
                    f"too many failed attempts with key id {key_id}: try again in {wait:.1f} s",
                    wait,
                )
            # This one check goes ahead; the rest wait until it is decided or the delay ends.
            record.blocked_until = now + self._delay(record.failures)

    def failed(self, key_id: str) -> None:
        """Count a failed check of ``key_id``."""
        with self._lock:
            now = self.clock()
            record = self._current(key_id, now) or _Record()
            record.failures += 1
            record.last_failure = now
            if record.failures >= self.threshold:
                record.blocked_until = now + self._delay(record.failures)
            self._records[key_id] = record
            self._records.move_to_end(key_id)
            while len(self._records) > self.max_ids:
                self._records.popitem(last=False)

    def succeeded(self, key_id: str) -> None:
        """The right secret was checked: forget the failures of ``key_id``."""
        with self._lock:
            self._records.pop(key_id, None)
