"""The one wait of the process-level tests: poll a condition until it holds or time runs out.

Tests assert eventual outcomes, never wall-clock durations (DEVELOPERS.md): a generous limit
is only there so that a broken run ends.
"""
from __future__ import annotations

import time
from collections.abc import Callable
from typing import TypeVar

T = TypeVar('T')


def wait_until(predicate: Callable[[], T], timeout_s: float, poll_s: float = 0.02) -> T:
    """The predicate's first truthy result, or its last (falsy) one after ``timeout_s``."""
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        result = predicate()
        if result:
            return result
        time.sleep(poll_s)
    return predicate()
