"""Start the controller node alone, as a managed node driven to active by launch.

Launch arguments:
  params_file  ROS 2 parameters file (default: the installed config/controller.yaml)
  transport    rclpy (default), dds (direct Cyclone DDS) or auto
  record       folder for a rosbag2 recording; '' (default) records nothing
  autostart    true (default): launch configures the node, and activates it once it is
               inactive, with launch_ros' lifecycle events, at start-up only (a later
               configure leaves it inactive); false: it stays unconfigured for another
               lifecycle manager (ros2 lifecycle set ...)

The node itself always starts with --no-autostart: launch_ros' LifecycleNode action follows
its ~/transition_event and calls its ~/change_state (ChangeState events, OnStateTransition
handlers), so a failed configure is reported here and the node stays unconfigured.

Example: ros2 launch constraint_ctrl controller.launch.py record:=/tmp/run1
The record option is only passed when set, so the node is built at launch time (OpaqueFunction)
rather than with a condition expression.
"""
from __future__ import annotations

import os

from ament_index_python.packages import get_package_share_directory
from launch import LaunchContext, LaunchDescription
from launch.actions import (DeclareLaunchArgument, EmitEvent, LogInfo, OpaqueFunction,
                            RegisterEventHandler)
from launch.events import matches_action
from launch.substitutions import LaunchConfiguration
from launch_ros.actions import LifecycleNode
from launch_ros.event_handlers import OnStateTransition
from launch_ros.events.lifecycle import ChangeState
from lifecycle_msgs.msg import Transition

PACKAGE = 'constraint_ctrl'
NODE_NAME = 'constraint_controller'


def controller_node(context: LaunchContext) -> list:
    """The controller LifecycleNode action and, with autostart, the events that drive it."""
    transport = LaunchConfiguration('transport').perform(context)
    record = LaunchConfiguration('record').perform(context).strip()
    params_file = LaunchConfiguration('params_file').perform(context)
    autostart = LaunchConfiguration('autostart').perform(context).lower() in ('true', '1')
    arguments = ['--transport', transport, '--no-autostart']
    if record:
        arguments += ['--record', record]
    node = LifecycleNode(package=PACKAGE, executable='controller_node', name=NODE_NAME,
                         namespace='', parameters=[params_file], arguments=arguments,
                         output='screen')
    if not autostart:
        return [node]

    def change(transition_id: int) -> EmitEvent:
        return EmitEvent(event=ChangeState(lifecycle_node_matcher=matches_action(node),
                                           transition_id=transition_id))
    # once: only the start-up's configure is followed by an activation; a later configure
    # (an operator's, after a cleanup) leaves the node inactive, as the managed-node design
    # says, instead of starting initial_skill without anyone asking
    activate_once_inactive = RegisterEventHandler(OnStateTransition(
        target_lifecycle_node=node, start_state='configuring', goal_state='inactive',
        handle_once=True,
        entities=[LogInfo(msg=f'{NODE_NAME} is inactive (configured): activating it'),
                  change(Transition.TRANSITION_ACTIVATE)]))
    return [activate_once_inactive, node, change(Transition.TRANSITION_CONFIGURE)]


def generate_launch_description() -> LaunchDescription:
    default_params = os.path.join(get_package_share_directory(PACKAGE), 'config',
                                  'controller.yaml')
    return LaunchDescription([
        DeclareLaunchArgument('params_file', default_value=default_params,
                              description='ROS 2 parameters file of the controller node'),
        DeclareLaunchArgument('transport', default_value='rclpy',
                              choices=['rclpy', 'dds', 'auto'],
                              description='rclpy, dds (direct Cyclone DDS) or auto'),
        DeclareLaunchArgument('record', default_value='',
                              description="new folder for a rosbag2 recording ('' = none)"),
        DeclareLaunchArgument('autostart', default_value='true', choices=['true', 'false'],
                              description='configure and activate the controller with '
                                          'lifecycle events (false: leave it unconfigured)'),
        OpaqueFunction(function=controller_node),
    ])
