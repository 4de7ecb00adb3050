"""The node parameter qp_solver (issue 11 item 5): read at start-up, refused at run time.

Outside reference: rclpy's parameter rules (ros2/rclpy rclpy/node.py: a read-only parameter is
refused with 'Trying to set a read-only parameter'), as for the node's other start-up
parameters (test_node_parameters.py).
"""
from __future__ import annotations

import os
import random
from pathlib import Path

import pytest

pytest.importorskip('cyclonedds')
pytest.importorskip('daqp')

from constraint_ctrl.nodes.controller_node import STARTUP_PARAMETERS, ControllerNode  # noqa: E402
from constraint_ctrl.transport.port import open_port  # noqa: E402

from node_harness import NodeHarness, copy_skills, moving  # noqa: E402


def _solvers(h: NodeHarness) -> set[str]:
    return {h.node.library.get(name).runner.solver.qp_solver
            for name in h.node.library.names()}


@pytest.mark.parametrize('value', [None, 'daqp'])
def test_every_skill_runs_with_the_solver_given_at_start_up(tmp_path: Path,
                                                            value: str | None) -> None:
    # a generous joint-state timeout: a busy machine must not stop the arm between two ticks
    params = {'rate_hz': '250.0', 'initial_skill': 'keep_tool_vertical',
              'watchdog.joint_state_timeout': '30.0'}
    if value is not None:
        params['qp_solver'] = value
    h = NodeHarness(copy_skills(tmp_path / 'skills', ('keep_tool_vertical', 'move_to_point')),
                    params)
    try:
        expected = value or 'quadprog'
        assert h.get('qp_solver') == expected
        assert _solvers(h) == {expected}
        outs = h.run(150)
        assert moving(outs[-1])
        # refused while configured like every parameter read at configure; nothing changed
        other = 'quadprog' if expected == 'daqp' else 'daqp'
        ok, why = h.set_parameters({'qp_solver': other})
        assert not ok and 'read at configure' in why, why
        assert h.get('qp_solver') == expected and _solvers(h) == {expected}
        assert 'qp_solver' in STARTUP_PARAMETERS
    finally:
        h.close()


def test_an_unknown_solver_stops_the_start_with_the_choices(tmp_path: Path) -> None:
    skills = copy_skills(tmp_path / 'skills', ('move_to_point',))
    old = os.environ.get('ROS_DOMAIN_ID')
    os.environ['ROS_DOMAIN_ID'] = str(random.randint(120, 200))
    try:
        port = open_port('dds', 'constraint_controller',
                         ['--ros-args', '-p', f'skills_folder:={skills}', '-p',
                          'qp_solver:=osqp'])
    finally:
        if old is None:
            os.environ.pop('ROS_DOMAIN_ID', None)
        else:
            os.environ['ROS_DOMAIN_ID'] = old
    try:
        # the configure step fails with the reason (the node stays unconfigured)
        node = ControllerNode(port)
        reason = node.configure()
        assert reason is not None and \
            "qp_solver must be one of quadprog, daqp, got 'osqp'" in reason, reason
        assert not node.configured
    finally:
        port.shutdown()
