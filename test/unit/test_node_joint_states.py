"""The controller node's joint_states handling: per-joint freshness and rejected samples.

Issue 8 items 1 and 9. The rule checked (common practice, safety-facts.md section 6): missing,
stale or implausible joint data means stop. A sample carrying other joints (a gripper's finger
on the same /joint_states topic), wrong names, a subset, duplicate names or empty arrays must
not keep the arm's joints fresh; malformed samples are rejected whole and counted.
"""
from __future__ import annotations

import math
import time
from pathlib import Path
from collections.abc import Iterator

import numpy as np
import pytest

pytest.importorskip('cyclonedds')

from constraint_ctrl.nodes.inputs import MAX_JOINT_NAMES, joint_sample_problem  # noqa: E402
from constraint_ctrl.safety.states import State  # noqa: E402

from node_harness import JOINTS, START, NodeHarness, copy_skills, moving  # noqa: E402

#: the watchdog's default joint_states timeout (runtime/watchdog_setup.py DEFAULTS)
TIMEOUT = 0.05


@pytest.fixture()
def node(tmp_path: Path) -> Iterator[NodeHarness]:
    h = NodeHarness(copy_skills(tmp_path / 'skills', ('keep_tool_vertical',)),
                    {'initial_skill': 'keep_tool_vertical', 'rate_hz': '250.0'})
    try:
        yield h
    finally:
        h.close()


def run_fresh(node: NodeHarness, ticks: int = 60) -> None:
    for _ in range(ticks):
        node.feed()
        node.tick()
    assert moving(node.outputs[-1]), node.outputs[-1].watchdog.reason


def starve_arm(node: NodeHarness, other: list[tuple[list[str], list[float]]]) -> None:
    """For longer than the timeout, only samples that do not refresh the arm arrive; the last
    tick runs at least 2 timeouts after the arm's last sample (however slow the machine)."""
    t0 = time.monotonic()
    while True:
        late = time.monotonic() - t0 > 2 * TIMEOUT
        for names, positions in other:
            node.node._on_joint_states(node.joint_states(names, positions))
        node.tick()
        if late:
            return
        time.sleep(0.002)


ALL = ', '.join(JOINTS)


@pytest.mark.parametrize(('other', 'stale'), [
    ([(['finger_joint'], [0.01])], ALL),                          # a gripper on the same topic
    ([(JOINTS[:3], START[:3])], 'joint_4, joint_5, joint_6'),     # a subset of the arm's joints
    ([(['elbow', 'wrist'], [0.1, 0.2])], ALL),                    # wrong names
    ([([], [])], ALL),                                            # empty arrays
    ([(JOINTS + ['joint_1'], START + [0.0])], ALL),               # duplicate names
    ([(JOINTS, START[:5])], ALL),                                 # length mismatch
], ids=['gripper', 'subset', 'wrong_names', 'empty', 'duplicates', 'length_mismatch'])
def test_samples_that_do_not_refresh_every_arm_joint_stop_the_arm(
        node: NodeHarness, other: list, stale: str) -> None:
    run_fresh(node)
    starve_arm(node, other)
    out = node.outputs[-1]
    assert out.watchdog.state is State.STOPPED
    assert not out.command.any()
    assert f'joint(s) {stale} not updated within 0.050 s' in out.watchdog.reason


def test_valid_samples_from_two_publishers_keep_moving(node: NodeHarness) -> None:
    """The arm's driver and a gripper on one topic: both valid, the arm keeps moving."""
    run_fresh(node)
    for _ in range(100):
        node.feed()
        node.node._on_joint_states(node.joint_states(['finger_joint'], [0.01]))
        out = node.tick()
    assert moving(out) and out.watchdog.state in (State.NORMAL, State.REDUCED)
    assert node.node._js_rejected == 0


@pytest.mark.parametrize(('names', 'positions', 'kind'), [
    (JOINTS + ['joint_1'], START + [0.0], 'duplicate names'),
    (JOINTS, START[:3] + [math.nan] + START[4:], 'non-finite position'),
    (JOINTS, START[:5] + [math.inf], 'non-finite position'),
    (JOINTS, START[:4], 'length mismatch'),
    ([f'j{i}' for i in range(MAX_JOINT_NAMES + 1)], [0.0] * (MAX_JOINT_NAMES + 1),
     'too many names'),
], ids=['duplicates', 'nan', 'inf', 'length', 'too_many'])
def test_malformed_samples_are_rejected_whole_counted_and_shown_in_status(
        node: NodeHarness, names: list[str], positions: list[float], kind: str) -> None:
    run_fresh(node)
    q_before = list(node.node._q)
    for _ in range(50):
        node.node._on_joint_states(node.joint_states(names, positions))
    assert node.node._q == q_before, 'a rejected sample changed joint positions'
    assert node.node._js_rejected == 50
    values = node.status_values()
    assert values['joint_states_rejected'] == '50'
    assert f'sample rejected ({kind})' in values['joint_states_last_rejection']
    warnings = [t for lvl, t in node.logs if 'joint_states: sample rejected' in t]
    assert len(warnings) == 1, warnings        # logged once, not 50 times
    if kind != 'too many names':
        # the sample named the arm's joints: they are invalid at once, the next tick stops
        out = node.tick()
        assert out.watchdog.state is State.STOPPED and not out.command.any()
        assert 'invalidated by a rejected sample' in out.watchdog.reason


def test_a_valid_sample_after_rejected_ones_is_used() -> None:
    assert joint_sample_problem(['a', 'b'], [0.0, 1.0]) is None
    assert joint_sample_problem([], []) is None      # empty: valid, refreshes nothing


def test_a_huge_sample_is_refused_before_any_per_name_work() -> None:
    """The size bound is checked first: a sequence whose elements are never touched."""
    class Untouchable:
        def __len__(self) -> int:
            return MAX_JOINT_NAMES + 1

        def __iter__(self):   # noqa: ANN204 - any per-name work would end here
            raise AssertionError('per-name work on a sample over the bound')

        __getitem__ = __iter__
    kind, detail = joint_sample_problem(Untouchable(), Untouchable())
    assert kind == 'too many names' and str(MAX_JOINT_NAMES) in detail


def test_person_positions_in_an_unusable_frame_are_logged_once_per_source(
        tmp_path: Path) -> None:
    """Issue 8 item 8: 55 identical warnings per second became one line when it starts and
    one when it stops; every unusable sample is counted in ~/status. Since issue 9.3 a frame
    is unusable when no transform into base_frame is known (nobody publishes camera_link
    here): the sample's position is NaN, a person anywhere for the watchdog."""
    h = NodeHarness(copy_skills(tmp_path / 'skills', ('keep_tool_vertical',)),
                    {'people.sources': '[/cell/operator, /cell/scanner]'})
    try:
        t = h.t
        callbacks = {src: h.node._person_callback(src) for src in ('/cell/operator',
                                                                    '/cell/scanner')}

        def person(frame: str) -> object:
            return t.PointStamped(header=t.Header(stamp=t.Time(sec=0, nanosec=0),
                                                  frame_id=frame),
                                  point=t.Point(x=2.0, y=0.0, z=1.0))
        for _ in range(200):
            callbacks['/cell/operator'](person('camera_link'))
            callbacks['/cell/scanner'](person('scanner_link'))
        lines = [text for _, text in h.logs if 'no transform' in text]
        assert len(lines) == 2, lines            # one per source
        assert any("camera_link" in x and x.startswith('/cell/operator') for x in lines)
        assert np.isnan(h.node._people['/cell/operator'].position).all()
        time.sleep(1.05)                          # ProblemLog's settle time without the problem
        for _ in range(50):
            callbacks['/cell/operator'](person('base_link'))
        back = [text for _, text in h.logs if "in 'base_link' again" in text]
        assert len(back) == 1 and '200 problem(s)' in back[0]
        assert np.isfinite(h.node._people['/cell/operator'].position).all()
        h.feed()
        h.tick()
        assert h.status_values()['person_samples_ignored'] == '400'
    finally:
        h.close()


def test_joint_command_is_stamped_with_the_sample_the_tick_used(node: NodeHarness) -> None:
    """~/joint_command carries the stamp of the joint_states sample its command answers: one
    arriving while the tick computes belongs to the next tick (found as 'moved on a stale person
    source' by the process-level fault test under load)."""
    run_fresh(node)
    t = node.t

    def sample(sec: int) -> object:
        return t.JointState(header=t.Header(stamp=t.Time(sec=sec, nanosec=0), frame_id=''),
                            name=JOINTS, position=node.q.tolist(), velocity=[], effort=[])
    node.node._on_joint_states(sample(1000))
    step = node.node.loop.step

    def step_with_a_late_sample(snap):  # noqa: ANN001, ANN202
        node.node._on_joint_states(sample(2000))     # arrives during the tick
        return step(snap)
    node.node.loop.step = step_with_a_late_sample
    sent: list[object] = []
    pub = node.node._pub_joint_command
    original = pub.publish
    pub.publish = sent.append
    try:
        node.node._tick()
    finally:
        pub.publish = original
        node.node.loop.step = step
    assert [m.header.stamp.sec for m in sent] == [1000]
