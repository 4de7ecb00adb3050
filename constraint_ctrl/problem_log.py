"""Counted problems that are logged once, not once per message.

Bad data at run time (a sample with duplicate joint names, a person position in a frame the node
cannot use, an undecodable sample) can arrive hundreds of times a second. Each occurrence is
counted; a log line is written when a source starts having the problem, when its reason changes,
at most once per ``interval`` while it goes on (with the count since the last line), and once
when the source is fine again: good data after at least ``settle`` seconds without the problem,
so a source that alternates good and bad samples does not log twice per bad sample. Usable from
any layer: it knows only a ``log(level, text)`` callable and a clock.
"""
from __future__ import annotations

import threading
import time
from collections.abc import Callable
from dataclasses import dataclass

#: Default minimum time between two lines about the same ongoing problem of one source (s).
INTERVAL = 60.0
#: Default time without the problem before good data ends it (s).
SETTLE = 1.0


@dataclass(slots=True)
class _Ongoing:
    reason: str
    since: float
    logged_at: float
    last_at: float
    count: int = 1            # occurrences since the problem started
    unlogged: int = 0         # occurrences since the last line


class ProblemLog:
    """Per-source problem counter that decides when to log; thread-safe.

    ``problem()`` is meant for the rare bad sample; ``ok()`` is called for every good one and
    costs one dict lookup while nothing is wrong.
    """

    def __init__(self, log: Callable[[str, str], None], *, interval: float = INTERVAL,
                 settle: float = SETTLE, clock: Callable[[], float] = time.monotonic,
                 level: str = 'warn') -> None:
        self._log = log
        self._interval = interval
        self._settle = settle
        self._clock = clock
        self._level = level
        self._lock = threading.Lock()
        self._ongoing: dict[str, _Ongoing] = {}
        self.total = 0                   # every problem ever counted, all sources
        self.last_reason = ''            # '<source>: <reason>' of the latest problem

    def problem(self, source: str, reason: str, detail: str = '') -> None:
        """Count one occurrence; log on start, on a new reason, or once per interval.

        ``reason`` should be stable for one kind of problem (it is what "a new reason" means);
        ``detail`` (the values of this occurrence) goes into ``last_reason`` and log lines.
        """
        now = self._clock()
        line = None
        text = f'{reason}: {detail}' if detail else reason
        with self._lock:
            self.total += 1
            self.last_reason = f'{source}: {text}'
            entry = self._ongoing.get(source)
            if entry is None:
                self._ongoing[source] = _Ongoing(reason, now, now, now)
                line = f'{source}: {text} (logged once; counted until it stops)'
            elif entry.reason != reason:
                entry.count += 1
                entry.last_at = now
                entry.reason, entry.logged_at, entry.unlogged = reason, now, 0
                line = f'{source}: {text} (now; {entry.count} problems since it started)'
            else:
                entry.count += 1
                entry.unlogged += 1
                entry.last_at = now
                if now - entry.logged_at >= self._interval:
                    line = (f'{source}: {text} (still; {entry.unlogged} more in the last '
                            f'{now - entry.logged_at:.0f} s, {entry.count} in all)')
                    entry.logged_at, entry.unlogged = now, 0
        if line is not None:
            self._log(self._level, line)

    def ok(self, source: str, what: str = 'fine again') -> None:
        """The source delivered good data: once the problem has been absent for ``settle``,
        log that it stopped (once) and forget it."""
        if source not in self._ongoing:       # fast path, no lock: nothing to report
            return
        now = self._clock()
        with self._lock:
            entry = self._ongoing.get(source)
            if entry is None or now - entry.last_at < self._settle:
                return
            del self._ongoing[source]
        self._log('info', f'{source}: {what} after {entry.count} problem(s) over '
                          f'{entry.last_at - entry.since:.3g} s ({entry.reason})')

    def ongoing(self) -> dict[str, str]:
        """{source: reason} of the problems going on now."""
        with self._lock:
            return {s: e.reason for s, e in self._ongoing.items()}


__all__ = ['INTERVAL', 'SETTLE', 'ProblemLog']
