"""The controller node puts person positions and point inputs into its base frame (issue 9.3).

Driven in-process (node_harness: a DDS port that never spins): /tf and /tf_static reach the
node through the subscription callbacks of its frames adapter, persons and inputs through
theirs. Expected points come from scipy.spatial.transform.Rotation (an outside reference for
the rotation of a point by a quaternion, x y z w order as in geometry_msgs/Quaternion).
Rules checked (common practice, safety-facts.md section 6): a person whose position cannot be
put into the base frame counts as a person anywhere (the arm stops); an input that cannot be
transformed is treated as an unusable (non-finite) input; each such fault is counted and logged
once when it starts and once when it stops.
"""
from __future__ import annotations

import time
from pathlib import Path
from typing import Any
from collections.abc import Iterator

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

pytest.importorskip('cyclonedds')

from constraint_ctrl.frames.messages import make_edge, tf_message  # noqa: E402
from constraint_ctrl.safety.states import State  # noqa: E402

from node_harness import NodeHarness, copy_skills, moving  # noqa: E402

SEC = 1_000_000_000
CAMERA_T = (0.8, -0.3, 1.6)
CAMERA_Q = Rotation.from_euler('xyz', [0.3, -2.4, 1.1]).as_quat()   # x, y, z, w


def stamp(t: Any, ns: int) -> Any:
    return t.Time(sec=ns // SEC, nanosec=ns % SEC)


def person(t: Any, frame: str, xyz: tuple[float, float, float], ns: int = 0) -> Any:
    return t.PointStamped(header=t.Header(stamp=stamp(t, ns), frame_id=frame),
                          point=t.Point(x=xyz[0], y=xyz[1], z=xyz[2]))


@pytest.fixture()
def node(tmp_path: Path) -> Iterator[NodeHarness]:
    h = NodeHarness(copy_skills(tmp_path / 'skills', ('keep_tool_vertical',)),
                    {'initial_skill': 'keep_tool_vertical', 'rate_hz': '250.0',
                     'people.sources': '[/cell/operator, /cell/camera]'})
    try:
        yield h
    finally:
        h.close()


def static_camera(h: NodeHarness) -> None:
    h.node.points.frames._on_tf_static(tf_message(h.t, [make_edge('base_link', 'camera', 0,
                                                                  CAMERA_T, CAMERA_Q)]))


def test_a_person_in_a_camera_frame_is_transformed_into_the_base_frame(
        node: NodeHarness) -> None:
    static_camera(node)
    in_camera = (1.2, -0.4, 2.5)
    node.node._person_callback('/cell/camera')(person(node.t, 'camera', in_camera))
    expected = Rotation.from_quat(CAMERA_Q).apply(in_camera) + np.array(CAMERA_T)
    got = node.node._people['/cell/camera'].position
    np.testing.assert_allclose(got, expected, atol=1e-9)
    assert node.node._person_problems.total == 0


def run_with_camera_person(h: NodeHarness, message: Any, ticks: int) -> list[Any]:
    """Fresh joint states and operator each tick, and the camera source's sample."""
    outs = []
    for _ in range(ticks):
        h.feed()
        h.node._person_callback('/cell/camera')(message())
        outs.append(h.tick())
    return outs


def test_a_person_in_an_unknown_frame_stops_the_arm_and_is_logged_once(
        node: NodeHarness) -> None:
    static_camera(node)
    far = (0.0, 0.0, 3.0)
    outs = run_with_camera_person(node, lambda: person(node.t, 'camera', far), 80)
    assert moving(outs[-1]), outs[-1].watchdog.reason
    outs = run_with_camera_person(node, lambda: person(node.t, 'nobody_publishes_this', far),
                                  200)
    assert outs[-1].watchdog.state is State.STOPPED
    assert not outs[-1].command.any()
    assert '/cell/camera' in outs[-1].watchdog.reason
    started = [x for _, x in node.logs if x.startswith('/cell/camera') and
               'no transform' in x]
    assert len(started) == 1, started
    assert 'nobody_publishes_this' in started[0]
    assert node.status_values()['person_samples_ignored'] == '200'
    assert int(node.status_values()['frames_unknown_frame']) == 200
    time.sleep(1.05)                  # ProblemLog's settle time without the problem
    outs = run_with_camera_person(node, lambda: person(node.t, 'camera', far), 50)
    again = [x for _, x in node.logs if x.startswith('/cell/camera') and 'again' in x]
    assert len(again) == 1 and '200 problem(s)' in again[0], again
    assert np.isfinite(node.node._people['/cell/camera'].position).all()


def test_a_person_whose_transform_went_old_is_a_fault_until_tf_is_back(
        node: NodeHarness) -> None:
    """The camera on a moving mount: /tf that stops for longer than people.transform_timeout
    (default 0.1 s) makes its persons unusable; /tf again makes them usable."""
    now = node.port.now_ns()

    def tf_at(ns: int) -> None:
        node.node.points.frames._on_tf(tf_message(node.t, [make_edge('base_link', 'camera', ns,
                                                              CAMERA_T, CAMERA_Q)]))
    tf_at(now - 50_000_000)
    tf_at(now)
    fresh = node.node._person_callback('/cell/camera')
    fresh(person(node.t, 'camera', (0.0, 0.0, 3.0), now + 40_000_000))    # 40 ms after /tf
    assert np.isfinite(node.node._people['/cell/camera'].position).all()
    fresh(person(node.t, 'camera', (0.0, 0.0, 3.0), now + 300_000_000))   # 300 ms after
    assert not np.isfinite(node.node._people['/cell/camera'].position).any()
    lines = [x for _, x in node.logs if x.startswith('/cell/camera')]
    assert len(lines) == 1 and 'stale_transform' in lines[0], lines
    tf_at(now + 290_000_000)
    fresh(person(node.t, 'camera', (0.0, 0.0, 3.0), now + 300_000_000))
    expected = Rotation.from_quat(CAMERA_Q).apply((0.0, 0.0, 3.0)) + np.array(CAMERA_T)
    np.testing.assert_allclose(node.node._people['/cell/camera'].position, expected,
                               atol=1e-9)


def test_a_point_input_in_another_frame_is_transformed_before_its_field_is_taken(
        tmp_path: Path) -> None:
    h = NodeHarness(copy_skills(tmp_path / 'skills', ('keep_tool_vertical',)),
                    {'inputs.target_height.topic': '/cell/marker',
                     'inputs.target_height.type': 'geometry_msgs/msg/PointStamped',
                     'inputs.target_height.field': 'point.z',
                     'inputs.target_height.frame': 'base_link',
                     'inputs.mount_height.topic': '/cell/marker_raw',
                     'inputs.mount_height.type': 'geometry_msgs/msg/PointStamped',
                     'inputs.mount_height.field': 'point.z'})
    try:
        static_camera(h)
        mapping = h.node.mappings['target_height']
        h.node._input_callback(mapping)(person(h.t, 'camera', (0.1, 0.2, 0.9)))
        expected = Rotation.from_quat(CAMERA_Q).apply((0.1, 0.2, 0.9))[2] + CAMERA_T[2]
        assert h.node._inputs['target_height'].value == pytest.approx(expected, abs=1e-12)
        # without frame: the field as received (today's behaviour)
        h.node._input_callback(h.node.mappings['mount_height'])(
            person(h.t, 'camera', (0.1, 0.2, 0.9)))
        assert h.node._inputs['mount_height'].value == pytest.approx(0.9)
        # no transform: not finite (the watchdog's unusable-input fault), logged once
        for _ in range(30):
            h.node._input_callback(mapping)(person(h.t, 'elsewhere', (0.1, 0.2, 0.9)))
        assert np.isnan(h.node._inputs['target_height'].value)
        lines = [x for _, x in h.logs if x.startswith('input target_height')]
        assert len(lines) == 1 and 'elsewhere' in lines[0], lines
    finally:
        h.close()


@pytest.mark.parametrize(('params', 'message'), [
    ({'inputs.h.frame': 'base_link', 'inputs.h.field': 'point.z'}, 'type'),
    ({'inputs.h.frame': 'base_link', 'inputs.h.type': 'geometry_msgs/msg/PointStamped',
      'inputs.h.field': 'header.stamp.sec'}, 'point.x, point.y or point.z'),
    ({'inputs.h.type': 'geometry_msgs/msg/PointStamped', 'inputs.h.transform_timeout': '-1.0'},
     'transform_timeout'),
])
def test_bad_frame_settings_of_an_input_are_refused_at_start(
        tmp_path: Path, params: dict[str, str], message: str) -> None:
    from constraint_ctrl.errors import ConstraintCtrlError
    with pytest.raises(ConstraintCtrlError, match=message):
        NodeHarness(copy_skills(tmp_path / 'skills', ('keep_tool_vertical',)),
                    {'inputs.h.topic': '/x', **params}).close()
