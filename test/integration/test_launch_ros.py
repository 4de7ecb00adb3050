"""launch_testing test of the installed controller.launch.py; runs only on a ROS 2 install.

Needs the package built and sourced (colcon build; source install/setup.bash), then
`colcon test --packages-select constraint_ctrl` or `python -m pytest test/integration/
test_launch_ros.py`; launch_testing's pytest plugin collects the module through the
`launch_test` mark. Without ROS 2 (launch, launch_ros, launch_testing, rclpy not importable)
the whole module is skipped at collection.

Checks, with launch_testing's documented fixtures (ros2/launch launch_testing README):
the controller logs its 'ready' line (it is logged when the node becomes active: the launch
file drives the managed node through configure and activate with launch_ros' lifecycle
events), answers lifecycle_msgs/srv/GetState with active [3] (lifecycle_msgs/msg/State
constants), publishes ~/status (diagnostic_msgs/DiagnosticArray),
exits with code 0 when launch shuts it down (SIGINT), and the `record` launch argument reaches
the node (a rosbag2 folder with metadata.yaml is left behind).
"""
from __future__ import annotations

import os
import shutil
import tempfile
import unittest
from pathlib import Path

import pytest

for _module in ('launch_testing', 'launch', 'launch_ros', 'launch_testing_ros', 'rclpy',
                'ament_index_python'):
    pytest.importorskip(_module, reason=f'{_module} is not importable: needs a ROS 2 install')

import launch  # noqa: E402
import launch_testing.actions  # noqa: E402
import launch_testing.asserts  # noqa: E402
from ament_index_python.packages import get_package_share_directory  # noqa: E402
from diagnostic_msgs.msg import DiagnosticArray  # noqa: E402
from launch.launch_description_sources import PythonLaunchDescriptionSource  # noqa: E402
from launch_testing_ros import WaitForTopics  # noqa: E402

pytestmark = pytest.mark.ros

#: Seconds allowed for start-up (URDF, skill compilation with casadi) on a slow, shared machine.
START_TIMEOUT = 60.0


@pytest.mark.launch_test
def generate_test_description():  # noqa: ANN201 - launch_testing's entry point
    launch_file = os.path.join(get_package_share_directory('constraint_ctrl'), 'launch',
                               'controller.launch.py')
    bag = Path(tempfile.mkdtemp(prefix='constraint_ctrl_launch_')) / 'bag'
    controller = launch.actions.IncludeLaunchDescription(
        PythonLaunchDescriptionSource(launch_file),
        launch_arguments={'transport': 'rclpy', 'record': str(bag)}.items())
    return (launch.LaunchDescription([controller, launch_testing.actions.ReadyToTest()]),
            {'bag': bag})


class TestControllerRunning(unittest.TestCase):
    """Active tests: they run while the launched controller is up."""

    def test_logs_ready(self, proc_output) -> None:  # noqa: ANN001 - injected fixture
        proc_output.assertWaitFor('ready', timeout=START_TIMEOUT)

    def test_launch_made_it_active(self, proc_output) -> None:  # noqa: ANN001
        import rclpy
        from lifecycle_msgs.srv import GetState
        proc_output.assertWaitFor('ready', timeout=START_TIMEOUT)
        rclpy.init()
        node = rclpy.create_node('lifecycle_probe')
        try:
            client = node.create_client(GetState, '/constraint_controller/get_state')
            self.assertTrue(client.wait_for_service(timeout_sec=10.0))
            future = client.call_async(GetState.Request())
            rclpy.spin_until_future_complete(node, future, timeout_sec=10.0)
            state = future.result().current_state
            self.assertEqual((state.id, state.label), (3, 'active'))
        finally:
            node.destroy_node()
            rclpy.try_shutdown()

    def test_publishes_status(self, proc_output) -> None:  # noqa: ANN001
        proc_output.assertWaitFor('ready', timeout=START_TIMEOUT)
        waiter = WaitForTopics([('/constraint_controller/status', DiagnosticArray)],
                               timeout=10.0)
        try:
            self.assertTrue(waiter.wait(), 'no DiagnosticArray on /constraint_controller/status')
        finally:
            waiter.shutdown()


@launch_testing.post_shutdown_test()
class TestControllerAfterShutdown(unittest.TestCase):
    """Run after launch has stopped the controller."""

    def test_exit_code_zero(self, proc_info) -> None:  # noqa: ANN001 - injected fixture
        launch_testing.asserts.assertExitCodes(proc_info)

    def test_record_argument_made_a_bag(self, bag: Path) -> None:
        self.addCleanup(shutil.rmtree, bag.parent, True)    # the mkdtemp folder of this test
        self.assertTrue((bag / 'metadata.yaml').is_file(),
                        f'record:={bag} did not leave a rosbag2 metadata.yaml')
