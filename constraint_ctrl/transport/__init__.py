"""Transport: the port nodes use to reach ROS 2, over rclpy or directly over Cyclone DDS.

Importing this package loads neither rclpy nor cyclonedds; `open_port` imports the one it
needs. The bag recorder lives in `constraint_ctrl.transport.bag` (needs `rosbags`).
"""
from constraint_ctrl.transport.port import (Client, ParameterView, Port, Publisher,
                                            Subscription, Timer, choose_distro, detect_distro,
                                            open_port)
from constraint_ctrl.transport.qos import PROFILES, QosProfile
from constraint_ctrl.transport.receive_faults import SourceFaults

__all__ = ['PROFILES', 'Client', 'ParameterView', 'Port', 'Publisher', 'QosProfile',
           'SourceFaults', 'Subscription', 'Timer', 'choose_distro', 'detect_distro',
           'open_port']
