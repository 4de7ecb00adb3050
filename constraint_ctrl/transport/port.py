"""The one interface nodes use to talk to ROS 2, with two implementations.

`open_port('rclpy', ...)` is a thin, exact mapping onto rclpy; `open_port('dds', ...)` speaks
the ROS 2 wire protocol of rmw_cyclonedds_cpp directly through cyclonedds-python, for machines
without a ROS install. Node code must run unchanged on both, so this interface keeps to what
rclpy offers and names things as rclpy does:

* messages are built with `port.types.<Name>(field=...)` using ROS field names; pass Python
  lists for sequences and read them back with `list(...)` or `np.asarray(...)`;
* parameters come back as objects with `.name` and `.value` (an `rclpy.parameter.Parameter` on
  rclpy, a `ParameterView` on the DDS port);
* callbacks (subscriptions, services, parameter changes, timers) run only while `spin()` runs,
  on threads of the port: the timer has its own thread, so a timer tick may run at the same time
  as a subscription or service callback. Guard shared state with a lock.
* a sample that cannot be decoded is dropped, and an exception raised by a subscription,
  service or timer callback is caught; both are counted per source (`faults()`), logged at
  most once a minute per source, and spin() goes on (receive_faults.py). One bad sample from a
  peer, or one failing callback, never ends the node;
* time is ROS time: `now_ns()` follows the node's clock (the system clock, or /clock while the
  parameter use_sim_time is true), and a timer created while use_sim_time is true runs on it;
* QoS is chosen by profile name (see qos.py);
* `port.distro` ('jazzy' or 'humble') names the message layouts and the bag format. On rclpy
  it is the installed ROS 2's (detect_distro), and a `--distro` that contradicts it is refused:
  rclpy's messages are the installed ones whatever a flag says. The DDS port has no installed
  ROS to follow: jazzy unless told otherwise.
"""
from __future__ import annotations

import importlib.util
import os
from collections.abc import Callable
from dataclasses import dataclass
from types import SimpleNamespace
from typing import Any, Protocol

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport.receive_faults import SourceFaults

DISTROS = ('jazzy', 'humble')
DISTRO_CHOICES = ('auto', *DISTROS)
TRANSPORTS = ('auto', 'rclpy', 'dds')
LOG_LEVELS = ('debug', 'info', 'warn', 'error')
#: Names of the transport's own threads that take samples off the wire and deliver them
#: (Cyclone DDS's receive, delivery-queue and timed-event threads, as /proc shows them). Both
#: ports run Cyclone in the process: the DDS port directly, rclpy through rmw_cyclonedds_cpp;
#: another RMW's threads are named otherwise and are not found by these names.
RECEIVE_THREADS = ('recv', 'dq.user', 'tev')

ParameterValue = bool | int | float | str | bytes | list[bool] | list[int] | list[float] | list[str]


@dataclass(frozen=True)
class ParameterView:
    """A declared parameter as the DDS port returns it (same attributes nodes use in rclpy)."""

    name: str
    value: ParameterValue


class Publisher(Protocol):
    topic_name: str   # fully qualified, after remapping (rclpy: Publisher.topic_name)

    def publish(self, msg: Any) -> None: ...


class Subscription(Protocol):
    topic_name: str   # fully qualified, after remapping (rclpy: Subscription.topic_name)


class Client(Protocol):
    def wait_for_service(self, timeout_s: float) -> bool: ...

    def call(self, request: Any, timeout_s: float) -> Any | None:
        """The response, or None when no reply came within timeout_s."""


class Timer(Protocol):
    missed: int  # periods skipped because a tick overran (or the process was stalled)

    def cancel(self) -> None: ...

    def reset(self) -> None:
        """Restart the period from now (rclpy's Timer.reset): the next call comes one full
        period later. For a timer that only stands in when something else did not happen."""

class Port(Protocol):
    node_name: str    # after `-r __node:=...`
    namespace: str    # '/' unless `-r __ns:=...`
    distro: str       # 'jazzy' | 'humble'
    types: SimpleNamespace

    def diagnostic_level(self, level: int) -> object:
        """DiagnosticStatus.level in the port's representation (rclpy wants bytes)."""

    def now_ns(self) -> int:
        """ROS time in ns, for header stamps: the node clock. That is the system clock, or,
        while the parameter use_sim_time is true, the latest rosgraph_msgs/Clock received on
        /clock (0 before the first one), as rclpy's node clock and TimeSource define it."""

    def type_name(self, msg_type: Any) -> str:
        """'sensor_msgs/msg/JointState' for a message class (for bags and messages)."""

    def create_publisher(self, msg_type: Any, topic: str, qos: str) -> Publisher: ...

    def create_subscription(self, msg_type: Any, topic: str, callback: Callable[[Any], None],
                            qos: str, *, control: bool = False) -> Subscription:
        """control=True: the callback belongs to the control path (what a tick reads), which
        the port runs on one thread of its own that nothing else queues on (rclpy: a hidden
        node with its own executor; DDS: the topic thread already is such a thread)."""

    def wait_for_message(self, msg_type: Any, topic: str, qos: str,
                         timeout_s: float) -> tuple[Any | None, str]:
        """(one message or None after timeout_s, the topic's fully qualified name), taken by
        a temporary subscription without spin(): for a latched (transient local) sample such
        as robot_description before the node spins (rclpy: rclpy.wait_for_message)."""

    def create_service(self, srv_type: Any, name: str,
                       callback: Callable[[Any, Any], Any]) -> object:
        """callback(request, response) fills and returns the response."""

    def destroy_service(self, handle: object) -> None: ...

    def destroy_publisher(self, publisher: Publisher) -> None:
        """rclpy Node.destroy_publisher: peers see the publisher go."""

    def destroy_subscription(self, subscription: Subscription) -> None:
        """rclpy Node.destroy_subscription: its callback is not called any more."""

    def destroy_timer(self, timer: Timer) -> None:
        """rclpy Node.destroy_timer: waits for a running call unless called from it."""

    def create_client(self, srv_type: Any, name: str) -> Client: ...

    def create_timer(self, period_s: float, callback: Callable[[], None], *,
                     control: bool = False) -> Timer:
        """Fixed rate; late ticks are skipped, not bunched. control=True: on the control
        path's thread (see create_subscription). Created while use_sim_time is
        false: on the monotonic clock. Created while it is true: on ROS time, so the timer
        does not fire while /clock stands still, as rclpy's ROS-time timers do."""

    def declare_parameter(self, name: str, value: ParameterValue, description: str = '',
                          read_only: bool = False,
                          value_range: tuple[float, float] | None = None,
                          ignore_override: bool = False) -> Any:
        """Declare (or adopt, if a launch override already declared it) a parameter.

        ``value_range`` (doubles) becomes the descriptor's floating_point_range: `ros2 param
        describe` shows it and values outside are refused. A launch value outside the range
        or refused by the validator raises TransportError (the override stays as it was);
        ``ignore_override`` declares ``value`` whatever the launch gave (rclpy's own flag).
        """

    def undeclare_parameter(self, name: str) -> None:
        """rclpy Node.undeclare_parameter; TransportError for unknown or read-only names."""

    def set_parameter(self, name: str, value: ParameterValue) -> tuple[bool, str]:
        """Set one parameter from the node itself, through the validator and listeners as a
        SetParameters call would; (ok, reason)."""

    def get_parameter(self, name: str) -> Any: ...

    def get_parameters_by_prefix(self, prefix: str) -> dict[str, Any]:
        """{name without 'prefix.': parameter}; '' gives all parameters."""

    def set_parameter_validator(
            self, callback: Callable[[dict[str, ParameterValue]], tuple[bool, str]]) -> None:
        """Called before any change is applied; (False, reason) rejects the whole change."""

    def add_parameter_listener(
            self, callback: Callable[[dict[str, ParameterValue]], None]) -> None:
        """Called after values changed, with the new values."""

    def get_topic_names_and_types(self) -> list[tuple[str, list[str]]]:
        """rclpy Node.get_topic_names_and_types(): every topic discovery knows, sorted."""

    def count_publishers(self, topic: str) -> int:
        """rclpy Node.count_publishers(): the name expanded against this node, not remapped."""

    def get_node_names_and_namespaces(self) -> list[tuple[str, str]]:
        """rclpy Node.get_node_names_and_namespaces(): [(name, namespace)] of the graph."""

    def get_service_names_and_types_by_node(self, node_name: str,
                                            node_namespace: str) -> list[tuple[str, list[str]]]:
        """rclpy Node.get_service_names_and_types_by_node(): the services that node serves."""

    def serialize(self, msg: Any) -> bytes:
        """CDR with the 4-byte encapsulation header, as stored in rosbag2."""

    def log(self, level: str, text: str) -> None:
        """To stderr and to /rosout (rcl_interfaces/Log), as an rclpy node's logger does."""

    def faults(self) -> dict[str, SourceFaults]:
        """Dropped samples and callback exceptions per source ('subscription /joint_states',
        'service /ctrl/get_parameters', 'timer 0', ...) since the node started."""

    #: True when the port's node is a managed node of the middleware itself (rclpy: an
    #: rclpy.lifecycle.LifecycleNode, opened with open_port(..., lifecycle=True)); then
    #: serve_lifecycle maps the steps onto it. Otherwise nodes/lifecycle.py serves the
    #: lifecycle services over the port's own services and publishers.
    native_lifecycle: bool

    def spin(self) -> None:
        """Run callbacks until shutdown() or SIGINT/SIGTERM; publishing still works after."""

    def shutdown(self) -> None: ...


def _available(module: str) -> bool:
    try:
        return importlib.util.find_spec(module) is not None
    except (ImportError, ValueError):
        return False


def detect_distro() -> tuple[str, str]:
    """(distro, how it was found) for the ROS 2 install rclpy loads its messages from.

    sensor_msgs/Range is the one message the nodes use whose layout differs: it has
    `variance` from Iron on and not in Humble (rosbags' ROS2_HUMBLE and ROS2_JAZZY type
    stores). ROS_DISTRO (set by the install's setup.bash) must agree with it; a distro other
    than humble or jazzy runs with the layout family its Range shows.
    """
    try:
        from sensor_msgs.msg import Range
        fields = set(Range.get_fields_and_field_types())
    except (ImportError, AttributeError) as exc:
        msg = (f'cannot tell which ROS 2 is installed: sensor_msgs/Range is not usable ({exc}); '
               'source /opt/ros/<distro>/setup.bash first')
        raise TransportError(msg) from None
    layout = 'jazzy' if 'variance' in fields else 'humble'
    seen = f"the installed sensor_msgs/Range has {'a' if layout == 'jazzy' else 'no'} `variance`"
    name = os.environ.get('ROS_DISTRO', '').strip()
    if not name:
        return layout, f'ROS_DISTRO is not set; {seen}'
    if name in DISTROS and name != layout:
        msg = (f'ROS_DISTRO={name} but {seen} field (the {layout} layout): the sourced '
               'setup.bash and the Python path belong to different ROS 2 installs; source '
               'only one of them')
        raise TransportError(msg)
    if name in DISTROS:
        return name, f'ROS_DISTRO={name}; {seen}'
    return layout, (f'ROS_DISTRO={name} is neither {" nor ".join(DISTROS)}; {seen}, so the '
                    f'{layout} message layouts and bag format are used')


def _choose(transport: str, requested: str) -> tuple[str, str]:
    if requested not in DISTRO_CHOICES:
        msg = f'distro {requested!r} is not supported; use one of {", ".join(DISTRO_CHOICES)}'
        raise TransportError(msg)
    if transport != 'rclpy':
        return ('jazzy', 'the default') if requested == 'auto' else (requested, 'as asked')
    detected, evidence = detect_distro()
    if requested not in ('auto', detected):
        msg = (f'--distro {requested} contradicts the installed ROS 2 ({detected}: {evidence}); '
               'on rclpy the message layouts are those of the installed ROS, so leave '
               f'--distro out or give --distro {detected}')
        raise TransportError(msg)
    return detected, evidence


def choose_distro(transport: str, requested: str = 'auto') -> str:
    """The distro a port on ``transport`` ('rclpy' or 'dds') uses when asked for
    ``requested`` ('auto', 'jazzy', 'humble'); raises when rclpy's install contradicts it."""
    return _choose(transport, requested)[0]


def open_port(transport: str, node_name: str, argv: list[str], *,
              distro: str = 'auto', lifecycle: bool = False) -> Port:
    """Create the node's port. 'auto' picks rclpy when it can be imported, else DDS; the
    distro follows choose_distro. ``lifecycle``: the node is a managed node (on rclpy an
    rclpy.lifecycle.LifecycleNode; see Port.native_lifecycle)."""
    if distro not in DISTRO_CHOICES:
        msg = f'distro {distro!r} is not supported; use one of {", ".join(DISTRO_CHOICES)}'
        raise TransportError(msg)
    if transport not in TRANSPORTS:
        msg = f'transport {transport!r} is unknown; use one of {", ".join(TRANSPORTS)}'
        raise TransportError(msg)
    if transport == 'auto':
        if _available('rclpy'):
            transport = 'rclpy'
        elif _available('cyclonedds'):
            transport = 'dds'
        else:
            msg = ('no transport available: rclpy is not importable (source a ROS 2 setup.bash) '
                   "and the Python package 'cyclonedds' is not installed (pip install cyclonedds)")
            raise TransportError(msg)
    if transport == 'rclpy':
        if not _available('rclpy'):
            msg = ("transport 'rclpy' needs a ROS 2 install: source /opt/ros/<distro>/setup.bash "
                   "first, or use transport 'dds'")
            raise TransportError(msg)
        chosen, evidence = _choose('rclpy', distro)
        from constraint_ctrl.transport.rclpy_port import RclpyPort
        port = RclpyPort(node_name, argv, distro=chosen, lifecycle=lifecycle)
        port.log('info', f'ROS 2 message layouts and bag format: {chosen} ({evidence})')
        return port
    if not _available('cyclonedds'):
        msg = "transport 'dds' needs the Python package 'cyclonedds' (pip install cyclonedds)"
        raise TransportError(msg)
    from constraint_ctrl.transport.dds_port import DdsPort
    return DdsPort(node_name, argv, distro=choose_distro('dds', distro))
