"""launch_testing test: controller.launch.py activates the controller once, at start-up only.

Runs only on a ROS 2 install (as test_launch_ros.py; skipped at collection without one).
The launch file's autostart configures the managed node and activates it when that first
configure ends in inactive. A later configure, asked for by an operator or another lifecycle
manager (`ros2 lifecycle set ... configure` after a cleanup), must leave the node inactive as
the managed-node design says (lifecycle_msgs/msg/State: configure ends in inactive [2]); an
automatic activation there would start the skill named by initial_skill without anyone asking.
Transition ids are lifecycle_msgs/msg/Transition's constants (deactivate 4, cleanup 2,
configure 1); rclpy's lifecycle_msgs services as `ros2 lifecycle` calls them.
"""
from __future__ import annotations

import os
import time
import unittest

import pytest

for _module in ('launch_testing', 'launch', 'launch_ros', 'rclpy', 'ament_index_python'):
    pytest.importorskip(_module, reason=f'{_module} is not importable: needs a ROS 2 install')

import launch  # noqa: E402
import launch_testing.actions  # noqa: E402
import launch_testing.asserts  # noqa: E402
from ament_index_python.packages import get_package_share_directory  # noqa: E402
from launch.launch_description_sources import PythonLaunchDescriptionSource  # noqa: E402

pytestmark = pytest.mark.ros

#: Seconds allowed for start-up and for each transition on a slow, shared machine.
START_TIMEOUT = 60.0
NODE = '/constraint_controller'


@pytest.mark.launch_test
def generate_test_description():  # noqa: ANN201 - launch_testing's entry point
    launch_file = os.path.join(get_package_share_directory('constraint_ctrl'), 'launch',
                               'controller.launch.py')
    controller = launch.actions.IncludeLaunchDescription(
        PythonLaunchDescriptionSource(launch_file), launch_arguments={'transport': 'rclpy'}.items())
    return launch.LaunchDescription([controller, launch_testing.actions.ReadyToTest()])


class TestManualConfigure(unittest.TestCase):

    def test_a_later_configure_stays_inactive(self, proc_output) -> None:  # noqa: ANN001
        import rclpy
        from lifecycle_msgs.msg import Transition
        from lifecycle_msgs.srv import ChangeState, GetState
        proc_output.assertWaitFor('ready', timeout=START_TIMEOUT)
        rclpy.init()
        node = rclpy.create_node('lifecycle_operator')
        try:
            get = node.create_client(GetState, f'{NODE}/get_state')
            change = node.create_client(ChangeState, f'{NODE}/change_state')
            self.assertTrue(get.wait_for_service(timeout_sec=10.0))
            self.assertTrue(change.wait_for_service(timeout_sec=10.0))

            def call(client, request):  # noqa: ANN001, ANN202
                future = client.call_async(request)
                rclpy.spin_until_future_complete(node, future, timeout_sec=START_TIMEOUT)
                self.assertIsNotNone(future.result())
                return future.result()

            def state() -> tuple[int, str]:
                s = call(get, GetState.Request()).current_state
                return s.id, s.label

            self.assertEqual(state(), (3, 'active'))      # the launch's own start-up
            for transition in (Transition.TRANSITION_DEACTIVATE, Transition.TRANSITION_CLEANUP,
                               Transition.TRANSITION_CONFIGURE):
                reply = call(change, ChangeState.Request(
                    transition=Transition(id=transition)))
                self.assertTrue(reply.success, f'transition {transition} failed')
            # launch reacts to the transition event within its own loop: give it time to
            # (wrongly) activate, then the state must still be inactive
            deadline = time.monotonic() + 5.0
            while time.monotonic() < deadline:
                self.assertEqual(state(), (2, 'inactive'))
                time.sleep(0.5)
        finally:
            node.destroy_node()
            rclpy.try_shutdown()


@launch_testing.post_shutdown_test()
class TestAfterShutdown(unittest.TestCase):

    def test_exit_code_zero(self, proc_info) -> None:  # noqa: ANN001 - injected fixture
        launch_testing.asserts.assertExitCodes(proc_info)
