"""The demo starts the sequencer only once the controller has finished starting.

The controller creates its bag folder as the last step of start-up (README, Recording); in a
full test run on a loaded 2-core machine a sequencer started after a fixed 2 s waited 5 s for
its first reply while the controller was still loading skills, and the plan aborted. These
checks use stand-ins for the processes and assert what the wait returns or raises, not how long
it takes.
"""
from __future__ import annotations

import subprocess
import sys
import threading
from pathlib import Path

import pytest

from constraint_ctrl.errors import ConstraintCtrlError
from constraint_ctrl.tools import demo


def _sleeper() -> subprocess.Popen:
    return subprocess.Popen([sys.executable, '-c', 'import time; time.sleep(60)'])


def test_returns_once_the_bag_folder_exists(tmp_path: Path,
                                            monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(demo, 'MIN_START_WAIT', 0.0)
    monkeypatch.setattr(demo, 'START_BUDGET', 600.0)
    bag = tmp_path / 'bag'
    proc = _sleeper()
    try:
        done = threading.Event()
        waiter = threading.Thread(target=lambda: (demo._wait_for_start(
            ((proc, 'controller'),), bag, tmp_path), done.set()), daemon=True)
        waiter.start()
        assert not done.wait(0.5), 'returned before the controller had started'
        bag.mkdir()
        assert done.wait(120.0), 'did not return after the bag folder appeared'
    finally:
        proc.kill()
        proc.wait()


def test_a_process_that_exits_at_start_is_named(tmp_path: Path,
                                                monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(demo, 'START_BUDGET', 600.0)
    gone = subprocess.Popen([sys.executable, '-c', 'pass'])
    gone.wait()
    with pytest.raises(ConstraintCtrlError, match='the simulator exited at start'):
        demo._wait_for_start(((gone, 'simulator'),), tmp_path / 'bag', tmp_path)
