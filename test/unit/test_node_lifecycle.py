"""The controller's lifecycle steps in this process (node_harness: a DDS port that never spins).

The managed-node design (design.ros2.org "Managed nodes", from memory): an inactive node holds
its configuration but processes no data; here that means zero commands only, the loop held.
What leaves the node is captured at the ~/command publisher.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
from node_harness import NodeHarness, copy_skills, moving


def capture_commands(h: NodeHarness) -> list[np.ndarray]:
    sent: list[np.ndarray] = []
    pub: Any = h.node._pub_command
    original = pub.publish

    def publish(msg: Any) -> None:
        sent.append(np.array(list(msg.data)))
        original(msg)
    pub.publish = publish
    return sent


def test_deactivate_holds_then_publishes_only_zeros(tmp_path: Path) -> None:
    h = NodeHarness(copy_skills(tmp_path / 'skills', ('move_to_point',)))
    try:
        reply = h.activate('move_to_point')
        assert reply.success, reply.message
        assert moving(h.run(20)[-1])
        assert h.while_ticking(lambda: h.node.lifecycle.trigger('deactivate'))
        assert h.node.loop.holding and not h.node.active
        sent = capture_commands(h)
        for _ in range(30):
            h.feed()
            h.node._tick()
        assert len(sent) == 30 and not any(c.any() for c in sent)
        # activation is refused while inactive, with the way out
        refused = h.node._cannot_activate('move_to_point')
        assert refused is not None and 'not active' in refused
        # active again: still holding until a skill is asked for
        assert h.node.lifecycle.trigger('activate')
        assert not moving(h.run(10)[-1]) and h.node.loop.holding
    finally:
        h.close()


def test_cleanup_releases_and_configure_again(tmp_path: Path) -> None:
    h = NodeHarness(copy_skills(tmp_path / 'skills', ('move_to_point',)))
    try:
        assert h.while_ticking(lambda: h.node.lifecycle.trigger('deactivate'))
        assert h.node.lifecycle.trigger('cleanup')
        assert not h.node.configured and h.node.loop is None and h.node.timer is None
        assert h.node._services == {}
        # tunables are undeclared with the skills
        assert 'move_to_point.goal_z' not in h.port.get_parameters_by_prefix('')
        # set while unconfigured, read by the next configure
        ok, why = h.set_parameters({'status_rate_hz': 5.0})
        assert ok, why
        assert h.node.lifecycle.trigger('configure')
        assert h.node._status_every == round(h.node.rate / 5.0)
        assert 'move_to_point.goal_z' in h.port.get_parameters_by_prefix('')
        ok, why = h.set_parameters({'status_rate_hz': 10.0})
        assert not ok and 'read at configure' in why
    finally:
        h.close()


def test_inactive_publishes_no_rows_and_no_markers(tmp_path: Path) -> None:
    """Inactive publishes nothing but zero commands and status (~/status, /diagnostics):
    ~/rows and ~/markers are the control's output, so they stop with it."""
    h = NodeHarness(copy_skills(tmp_path / 'skills', ('move_to_point',)))
    try:
        posted: list[Any] = []
        h.node._markers.post = posted.append     # type: ignore[method-assign]
        rows: list[Any] = []
        status: list[Any] = []
        h.node._pub_rows.publish = rows.append   # type: ignore[method-assign]
        h.node._pub_status.publish = status.append   # type: ignore[method-assign]
        every = h.node._markers_every
        assert every > 0
        reply = h.activate('move_to_point')
        assert reply.success, reply.message
        h.run(2 * every)
        h.node._publish_status(*h.node._status_job(h.outputs[-1]))
        assert posted and rows and status, 'active: markers, rows and status all go out'
        assert h.while_ticking(lambda: h.node.lifecycle.trigger('deactivate'))
        assert not h.node.active
        del posted[:], rows[:], status[:]
        for _ in range(2 * every):
            h.feed()
            h.node._tick()
        h.node._publish_status(*h.node._status_job(h.outputs[-1]))
        assert status, 'inactive: ~/status still goes out'
        assert posted == [] and rows == [], 'inactive: ~/markers or ~/rows went out'
    finally:
        h.close()


def test_cleanup_closes_the_frames_adapter(tmp_path: Path) -> None:
    """On rclpy the frames adapter (tf2_ros listener and buffer) made subscriptions and a
    service on the node itself; cleanup must release them with the rest."""
    h = NodeHarness(copy_skills(tmp_path / 'skills', ('move_to_point',)))
    try:
        closed: list[bool] = []
        frames = h.node.points.frames
        close = frames.close
        frames.close = lambda: (closed.append(True), close())[1]   # type: ignore[method-assign]
        assert h.while_ticking(lambda: h.node.lifecycle.trigger('deactivate'))
        assert h.node.lifecycle.trigger('cleanup')
        assert closed == [True]
    finally:
        h.close()


def moving_fast(h: NodeHarness) -> tuple[np.ndarray, np.ndarray]:
    """move_to_point for 200 ticks (it ramps its speed up: about 0.2 rad/s); the last command
    and the watchdog's largest change per command, a_max * dt, per joint."""
    reply = h.activate('move_to_point')
    assert reply.success, reply.message
    last = h.run(200)[-1].command
    a_max = np.asarray(h.node.watchdog.config.acceleration_limits, dtype=float)
    step = a_max * h.node.dt
    assert (np.abs(last) > 3 * step).any(), 'too slow to show a cut ramp'
    return last, step


def worst_excess(series: list[np.ndarray], step: np.ndarray) -> float:
    """By how much the largest change between consecutive commands exceeds ``step``."""
    return max(float((np.abs(b - a) - step).max()) for a, b in zip(series, series[1:]))


@pytest.mark.parametrize('transition', ['deactivate', 'shutdown'])
def test_leaving_active_ramps_down_within_the_acceleration_limit(tmp_path: Path,
                                                                transition: str) -> None:
    """Deactivate is "hold, then inactive" (shutdown too ends in zero), and the hold ramps
    joint speeds down within the acceleration limit (watchdog.joint_acceleration). Leaving
    active must not cut that ramp short with a zero command: between any two commands sent,
    no joint's velocity may change by more than a_max * dt (the rate limit the watchdog
    applies to every command)."""
    h = NodeHarness(copy_skills(tmp_path / 'skills', ('move_to_point',)))
    try:
        last, step = moving_fast(h)
        assert moving(h.outputs[-1])
        sent = capture_commands(h)
        assert h.while_ticking(lambda: h.node.lifecycle.trigger(transition))
        if transition == 'deactivate':
            for _ in range(5):
                h.feed()
                h.node._tick()
        series = [last, *sent]
        worst = worst_excess(series, step)
        assert worst <= 1e-9, f'a command changed by {worst:.4g} rad/s more than a_max*dt'
        assert not sent[-1].any() and not h.node.active
    finally:
        h.close()


def test_stopping_the_process_while_moving_ramps_down_within_the_acceleration_limit(
        tmp_path: Path) -> None:
    """SIGINT/SIGTERM: serve() ends spin() (no more ticks), then close() runs the shutdown.
    The velocity commands from the last one sent down to zero must still change by at most
    a_max * dt per command (the watchdog's rate limit), as the hold would ramp; never faster
    than the last command."""
    h = NodeHarness(copy_skills(tmp_path / 'skills', ('move_to_point',)))
    try:
        last, step = moving_fast(h)
        sent = capture_commands(h)
        h.node.close()                       # what serve() calls once spin() has returned
        series = [last, *sent]
        worst = worst_excess(series, step)
        assert worst <= 1e-9, f'a command changed by {worst:.4g} rad/s more than a_max*dt'
        assert all((np.abs(b) <= np.abs(a) + 1e-12).all() for a, b in zip(series, series[1:]))
        assert not sent[-1].any()
    finally:
        h.close()
