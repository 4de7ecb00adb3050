"""The gearbox work cell under ros2 launch: simulated cell, controller and task sequencer.

It starts the same three nodes as `constraint-ctrl demo` (cell_simulator, the controller through
controller.launch.py, task_sequencer with the installed plans/gearbox_assembly.yaml) and stops
all of them as soon as one exits, normally when the sequencer finishes the plan. The controller
is a managed node: controller.launch.py configures and activates it with lifecycle events, and
the sequencer starts once the controller's ~/transition_event says it is active. Unlike
`constraint-ctrl demo` there is no evaluation step (no summary, criteria or plots) and no random
ROS_DOMAIN_ID: the nodes use the caller's environment.

Launch arguments:
  transport    rclpy (default), dds or auto, for all three nodes
  params_file  controller parameters (default: the installed config/controller.yaml)
  plan         task plan YAML (default: the installed config/plans/gearbox_assembly.yaml)
  record       folder for the controller's rosbag2 recording; '' (default) records nothing
"""
from __future__ import annotations

import os

from ament_index_python.packages import get_package_share_directory
from launch import LaunchDescription
from launch.actions import (DeclareLaunchArgument, EmitEvent, IncludeLaunchDescription,
                            LogInfo, RegisterEventHandler)
from launch.event_handlers import OnProcessExit
from launch.events import Shutdown
from launch.launch_description_sources import PythonLaunchDescriptionSource
from launch.substitutions import LaunchConfiguration
from launch_ros.actions import Node
from launch_ros.event_handlers import OnStateTransition

PACKAGE = 'constraint_ctrl'


def generate_launch_description() -> LaunchDescription:
    share = get_package_share_directory(PACKAGE)
    transport = LaunchConfiguration('transport')
    simulator = Node(package=PACKAGE, executable='cell_simulator', name='cell_simulator',
                     arguments=['--transport', transport], output='screen')
    controller = IncludeLaunchDescription(
        PythonLaunchDescriptionSource(os.path.join(share, 'launch', 'controller.launch.py')),
        launch_arguments={'transport': transport,
                          'params_file': LaunchConfiguration('params_file'),
                          'record': LaunchConfiguration('record')}.items())
    sequencer = Node(package=PACKAGE, executable='task_sequencer', name='task_sequencer',
                     arguments=[LaunchConfiguration('plan'), '--transport', transport],
                     output='screen')
    # The controller (the demo's only managed node) became active: its skills can be
    # activated now, so the plan can start.
    start_plan = RegisterEventHandler(OnStateTransition(
        goal_state='active', handle_once=True, entities=[
            LogInfo(msg='demo: the controller is active; starting the task sequencer'),
            sequencer]))
    # No target: whichever of the three processes exits first ends the demo.
    # Only the first exit emits Shutdown: launch_ros' ROS adapter (running for the lifecycle
    # events) shuts down on the first Shutdown event and raises on a second one.
    stop_all = RegisterEventHandler(OnProcessExit(handle_once=True, on_exit=[
        LogInfo(msg='demo: a node exited (the plan ended or a node stopped); shutting down'),
        EmitEvent(event=Shutdown(reason='a demo node exited'))]))
    return LaunchDescription([
        DeclareLaunchArgument('transport', default_value='rclpy',
                              choices=['rclpy', 'dds', 'auto'],
                              description='rclpy, dds (direct Cyclone DDS) or auto'),
        DeclareLaunchArgument('params_file',
                              default_value=os.path.join(share, 'config', 'controller.yaml'),
                              description='ROS 2 parameters file of the controller node'),
        DeclareLaunchArgument('plan',
                              default_value=os.path.join(share, 'config', 'plans',
                                                         'gearbox_assembly.yaml'),
                              description='task plan run by the sequencer'),
        DeclareLaunchArgument('record', default_value='',
                              description="new folder for a rosbag2 recording ('' = none)"),
        stop_all,
        start_plan,
        simulator,
        controller,
    ])
