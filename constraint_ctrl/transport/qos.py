"""Named QoS profiles shared by both ports and the bag recorder.

Nodes pick a profile by name so the same node code runs on rclpy and on the DDS port; each
port maps the neutral record below onto its own QoS objects. Values follow ROS 2's presets
(rmw/include/rmw/qos_profiles.h): 'sensor' = sensor_data, 'default' = the default profile,
'services' = services_default, 'parameters' = parameters and parameter_events. 'status' is
our own latched profile for late joiners (reliable, keep last 1, transient local).
'latest' is sensor_data with keep last 1: for the control path, which only ever wants the
newest sample; a sample still waiting when a newer one arrives is replaced in the reader, so a
node that fell behind works on the newest sample instead of through a backlog.
'tf' and 'tf_static' are tf2_ros's TransformListener subscriptions (tf2_ros_py
transform_listener.py, Humble and Jazzy: QoSProfile(depth=100, VOLATILE / TRANSIENT_LOCAL,
KEEP_LAST), reliable by QoSProfile's default); 'robot_description' is what
robot_state_publisher offers on that topic (rclcpp::QoS(1).transient_local(), reliable).
'command' is for commands to a robot driver or a forward command controller: reliable, keep
last 1, volatile, so a late or slow reader gets the newest command and never a queue of old
ones (a position target from 10 ticks ago would pull the arm back).
"""
from __future__ import annotations

from dataclasses import dataclass

from constraint_ctrl.errors import TransportError


@dataclass(frozen=True)
class QosProfile:
    """History is always KEEP_LAST; deadline and liveliness stay at ROS defaults; lifespan is
    infinite unless given (in seconds)."""

    depth: int
    reliable: bool
    transient_local: bool
    lifespan_s: float = 0.0


PROFILES: dict[str, QosProfile] = {
    'sensor': QosProfile(depth=5, reliable=False, transient_local=False),
    'latest': QosProfile(depth=1, reliable=False, transient_local=False),
    'default': QosProfile(depth=10, reliable=True, transient_local=False),
    'status': QosProfile(depth=1, reliable=True, transient_local=True),
    'command': QosProfile(depth=1, reliable=True, transient_local=False),
    'services': QosProfile(depth=10, reliable=True, transient_local=False),
    'parameters': QosProfile(depth=1000, reliable=True, transient_local=False),
    'tf': QosProfile(depth=100, reliable=True, transient_local=False),
    'tf_static': QosProfile(depth=100, reliable=True, transient_local=True),
    'robot_description': QosProfile(depth=1, reliable=True, transient_local=True),
}

# Not selectable by nodes: the writer side of rmw_cyclonedds' node-discovery topic,
DISCOVERY_INFO = QosProfile(depth=1, reliable=True, transient_local=True)
# the /rosout publisher of rcl (rcl/logging_rosout.h: keep last 1000, reliable, transient
# local, lifespan 10 s; ros2-interop.md section 3.1),
ROSOUT = QosProfile(depth=1000, reliable=True, transient_local=True, lifespan_s=10.0)
# and the /clock subscription of rclpy's TimeSource (keep last 1, best effort, volatile).
CLOCK = QosProfile(depth=1, reliable=False, transient_local=False)


def profile(name: str) -> QosProfile:
    """Look a profile up by name; the error lists the names that exist."""
    try:
        return PROFILES[name]
    except KeyError:
        known = ', '.join(sorted(PROFILES))
        msg = f'unknown QoS profile {name!r}; use one of: {known}'
        raise TransportError(msg) from None
