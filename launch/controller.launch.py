"""Start the controller node alone, for a cell whose drivers publish joint states and sensors.

Launch arguments:
  params_file  ROS 2 parameters file (default: the installed config/controller.yaml)
  transport    rclpy (default), dds (direct Cyclone DDS) or auto
  record       folder for a rosbag2 recording; '' (default) records nothing

Example: ros2 launch constraint_ctrl controller.launch.py record:=/tmp/run1
The record option is only passed when set, so the node is built at launch time (OpaqueFunction)
rather than with a condition expression.
"""
from __future__ import annotations

import os

from ament_index_python.packages import get_package_share_directory
from launch import LaunchContext, LaunchDescription
from launch.actions import DeclareLaunchArgument, OpaqueFunction
from launch.substitutions import LaunchConfiguration
from launch_ros.actions import Node

PACKAGE = 'constraint_ctrl'
NODE_NAME = 'constraint_controller'


def controller_node(context: LaunchContext) -> list[Node]:
    """The controller Node action for the launch arguments' values."""
    transport = LaunchConfiguration('transport').perform(context)
    record = LaunchConfiguration('record').perform(context).strip()
    params_file = LaunchConfiguration('params_file').perform(context)
    arguments = ['--transport', transport]
    if record:
        arguments += ['--record', record]
    return [Node(package=PACKAGE, executable='controller_node', name=NODE_NAME,
                 parameters=[params_file], arguments=arguments, output='screen')]


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
        OpaqueFunction(function=controller_node),
    ])
