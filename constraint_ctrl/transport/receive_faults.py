"""Counting what goes wrong on a receive path, and saying so once a minute, not per sample.

Both ports route every subscription, service and timer callback through one FaultLog: a
sample that cannot be taken or decoded is dropped, an exception raised by the node's callback
is caught, and either is counted per source ('subscription /joint_states', 'service
/ctrl/get_parameters', 'timer 0'). The first failure of a source is logged at once; later ones
are counted and logged at most once per interval (60 s), with the count since the last line,
so a flood of bad samples cannot flood the log. The node reads the counts with
`port.faults()` for its status. Nothing here ends spin(): the receive path goes on with the
next sample, as the user's rules require (bad input never ends the node).
"""
from __future__ import annotations

import sys
import threading
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass, replace

LOG_INTERVAL_S = 60.0


@dataclass(frozen=True)
class SourceFaults:
    """Failures of one receive path since the node started."""

    dropped: int = 0            # samples that could not be taken or decoded
    callback_errors: int = 0    # exceptions raised by the node's callback
    last_error: str = ''        # the latest failure, one line


class FaultLog:
    """Thread-safe per-source counters with rate-limited logging (see the module docstring)."""

    def __init__(self, log: Callable[[str, str], None], *, interval_s: float = LOG_INTERVAL_S,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self._log = log
        self._interval = interval_s
        self._clock = clock
        self._lock = threading.Lock()
        self._faults: dict[str, SourceFaults] = {}
        self._last_logged: dict[str, float] = {}
        self._unlogged: dict[str, int] = {}

    def dropped(self, source: str, exc: BaseException) -> None:
        """A sample of `source` could not be taken or decoded; it is dropped."""
        self._record(source, exc, dropped=True)

    def callback_failed(self, source: str, exc: BaseException) -> None:
        """The node's callback for `source` raised; the next sample is handled as usual."""
        self._record(source, exc, dropped=False)

    def snapshot(self) -> dict[str, SourceFaults]:
        with self._lock:
            return dict(self._faults)

    def _record(self, source: str, exc: BaseException, *, dropped: bool) -> None:
        line = f'{type(exc).__name__}: {exc}'.splitlines()[0] if str(exc) else \
            type(exc).__name__
        now = self._clock()
        with self._lock:
            old = self._faults.get(source, SourceFaults())
            self._faults[source] = replace(
                old, dropped=old.dropped + dropped,
                callback_errors=old.callback_errors + (not dropped), last_error=line)
            last = self._last_logged.get(source)
            if last is not None and now - last < self._interval:
                self._unlogged[source] = self._unlogged.get(source, 0) + 1
                return
            self._last_logged[source] = now
            missed = self._unlogged.pop(source, 0)
            counts = self._faults[source]
        since = (f' ({missed} more since the last report; {counts.dropped} dropped and '
                 f'{counts.callback_errors} callback errors in all)' if last is not None
                 else '')
        if dropped:
            level = 'warn'
            text = (f'{source}: dropped a sample that cannot be read: {line}{since}; further '
                    f'failures are counted and reported at most every {self._interval:g} s')
        else:
            level = 'error'
            detail = ''.join(traceback.format_exception(exc)).rstrip()
            text = (f'{source}: callback raised, the node goes on{since}; further failures '
                    f'are counted and reported at most every {self._interval:g} s:\n{detail}')
        try:
            self._log(level, text)
        except Exception:  # noqa: BLE001 - reporting must never end the receive path
            sys.stderr.write(f'[{level.upper()}] {text}\n')

    def guard_service(self, source: str,
                      callback: Callable[[object, object], object]) -> Callable[..., object]:
        """A service callback wrapped so that an exception is counted and logged and the
        caller still gets a reply: the response it was given, with `success` false and the
        error in `message` where the response type has those fields (std_srvs Trigger and
        SetBool, and the services built like them)."""
        def guarded(request: object, response: object) -> object:
            try:
                return callback(request, response)
            except Exception as exc:  # noqa: BLE001 - counted and logged; an error reply
                self.callback_failed(source, exc)
                if hasattr(response, 'success'):
                    response.success = False  # type: ignore[attr-defined]
                if hasattr(response, 'message'):
                    response.message = f'{type(exc).__name__}: {exc}'  # type: ignore[attr-defined]
                return response
        return guarded

    def guard(self, source: str, callback: Callable[..., object]) -> Callable[..., object]:
        """`callback` wrapped so that an exception is counted and logged, not raised."""
        def guarded(*args: object) -> object:
            try:
                return callback(*args)
            except Exception as exc:  # noqa: BLE001 - counted and logged; the node goes on
                self.callback_failed(source, exc)
                return None
        return guarded
