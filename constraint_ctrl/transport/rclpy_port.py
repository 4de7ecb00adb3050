"""The port over rclpy: a thin mapping of port.Port onto rclpy's own API.

Written against rclpy Jazzy; Humble differences are handled where noted. Not runnable in this
project's CI (no ROS install); every call below is one rclpy documents:

* rclpy.init(args=argv, signal_handler_options=SignalHandlerOptions.NO) - rclpy parses
  --ros-args itself; its own SIGINT handler is off so that spin() can return while the context
  is still valid and the node can publish a final command;
* Node(name, automatically_declare_parameters_from_overrides=True), or for a managed node
  (open_port(..., lifecycle=True)) rclpy.lifecycle.LifecycleNode with the same arguments,
  whose on_configure/on_activate/on_deactivate/on_cleanup/on_shutdown/on_error run the steps
  given to serve_lifecycle (a step's reason -> TransitionCallbackReturn.FAILURE, an exception
  -> ERROR, as rclpy itself turns one into ERROR; both logged here, since rclpy logs
  neither); rcl_lifecycle serves ~/change_state, ~/get_state, ~/get_available_states,
  ~/get_available_transitions, ~/get_transition_graph and publishes ~/transition_event, and
  the node's own requests (autostart) are LifecycleNode.trigger_configure() and its siblings;
* the control path (entities created with control=True: the controller's joint_states,
  input and person subscriptions and its control timer) lives on a second, hidden node of the
  same context, `_<name>_control` (a leading underscore hides a node from `ros2 node list`;
  created with use_global_arguments=False, enable_rosout=False,
  start_parameter_services=False, names resolved by the main node with
  Node.resolve_topic_name, so remapping and namespace are the main node's), spun by its own
  executor on its own thread: rclpy.experimental.EventsExecutor where rclpy has it (Jazzy from
  rclpy 7.1.4; callbacks dispatched from C++, no wait set rebuilt per callback), else a
  SingleThreadedExecutor. One thread, one callback group: a sample is taken and the tick runs
  without a hand-over to a thread pool, and nothing else queues in front of it. An rclpy node
  belongs to one executor, hence the second node;
* everything else (services, the parameter services, clients, other subscriptions and
  timers) stays on the main node with a MultiThreadedExecutor on the thread that calls
  spin(): services and the parameter services in the node's default group, subscriptions in a
  second group, timers in a third, clients in a ReentrantCallbackGroup, so a service that
  waits for a tick (skill activation) never blocks one;
* QoS: rclpy presets (qos_profile_sensor_data, qos_profile_services_default,
  qos_profile_parameters) or QoSProfile built from qos.PROFILES;
* validator -> add_on_set_parameters_callback returning SetParametersResult; listeners ->
  add_post_set_parameters_callback (Jazzy), or called from the on-set callback after the
  validator accepted (Humble has no post-set callbacks);
* timers use a steady clock (Clock(clock_type=ClockType.STEADY_TIME)), as the DDS port's do,
  unless use_sim_time is true when the timer is created: then the node clock
  (node.get_clock(), ROS time, driven by /clock through rclpy's TimeSource), so the timer
  does not fire while /clock stands still; now_ns() is always the node clock;
* /rosout and use_sim_time are rclpy's own (its logger and TimeSource);
* publishers and subscriptions are rclpy's own: their topic_name property (Humble and Jazzy)
  is the fully qualified name after remapping;
* the distro is the installed ROS 2's (port.detect_distro: ROS_DISTRO and the installed
  sensor_msgs/Range fields), never a flag's.

Additions over plain rclpy, kept identical to the DDS port: declare_parameter adopts a value
that a launch override already declared (rclpy would raise ParameterAlreadyDeclaredException;
with ignore_override the override is undeclared first, then the given value declared), a
rejected launch value raises TransportError (rclpy: InvalidParameterValueException),
timers count `missed` periods, client.call takes a timeout and works before spin(), and
callbacks are wrapped by receive_faults.FaultLog: an exception raised by a subscription or
timer callback is counted and logged at most once a minute (rclpy would end spin()), one
raised by a service callback also gives the caller an error reply, and an exception that
rclpy's executor raises while taking a sample (a sample rclpy cannot convert, such as a string
that is not UTF-8) is counted as a dropped sample of 'rclpy executor' and spinning goes on.
Sources are named by the names given to the port (before remapping).
Parameter ranges are ParameterDescriptor.floating_point_range, so rclpy itself refuses values
outside them (Node._apply_floating_point_range) before the validator runs.
"""
from __future__ import annotations

import threading
from collections.abc import Callable
from types import SimpleNamespace
from typing import Any

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport.port import DISTROS, LOG_LEVELS
from constraint_ctrl.transport.qos import profile
from constraint_ctrl.transport.receive_faults import FaultLog, SourceFaults
from constraint_ctrl.transport.signals import StopSignals


def _types() -> SimpleNamespace:
    """The same names as the DDS port's types (dds_types.MESSAGES and SERVICES and the types
    they contain), from the installed ROS packages."""
    from builtin_interfaces.msg import Duration, Time
    from diagnostic_msgs.msg import DiagnosticArray, DiagnosticStatus, KeyValue
    from geometry_msgs.msg import (Point, PointStamped, Pose, Quaternion, Transform,
                                   TransformStamped, Vector3, Wrench, WrenchStamped)
    from lifecycle_msgs.msg import State, Transition, TransitionDescription, TransitionEvent
    from lifecycle_msgs.srv import (ChangeState, GetAvailableStates, GetAvailableTransitions,
                                    GetState)
    from rcl_interfaces.msg import (FloatingPointRange, IntegerRange, ListParametersResult,
                                    Log, Parameter, ParameterDescriptor, ParameterEvent,
                                    ParameterType, ParameterValue, SetParametersResult)
    from rcl_interfaces.srv import (DescribeParameters, GetParameters, GetParameterTypes,
                                    ListParameters, SetParameters, SetParametersAtomically)
    from rosgraph_msgs.msg import Clock
    from sensor_msgs.msg import CompressedImage, JointState, Range
    from std_msgs.msg import (Bool, ColorRGBA, Float64, Float64MultiArray, Header,
                              MultiArrayDimension, MultiArrayLayout, String)
    from std_srvs.srv import SetBool, Trigger
    from tf2_msgs.msg import TFMessage
    from visualization_msgs.msg import Marker, MarkerArray, MeshFile, UVCoordinate
    return SimpleNamespace(**{cls.__name__: cls for cls in (
        Time, Duration, Header, Float64, String, Bool, MultiArrayDimension, MultiArrayLayout,
        Float64MultiArray, JointState, Range, Vector3, Point, PointStamped, Wrench,
        WrenchStamped, Quaternion, Pose, Transform, TransformStamped, TFMessage, ColorRGBA,
        CompressedImage, UVCoordinate, MeshFile, Marker, MarkerArray, KeyValue,
        DiagnosticStatus, DiagnosticArray, State, Transition, TransitionDescription,
        TransitionEvent, Clock, Log, ParameterType, ParameterValue, Parameter,
        FloatingPointRange, IntegerRange, ParameterDescriptor, SetParametersResult,
        ListParametersResult, ParameterEvent, Trigger, SetBool, SetParameters,
        SetParametersAtomically, GetParameters, GetParameterTypes, ListParameters,
        DescribeParameters, ChangeState, GetState, GetAvailableStates,
        GetAvailableTransitions)})


def _qos(name: str) -> Any:
    from rclpy.qos import (DurabilityPolicy, HistoryPolicy, QoSProfile, ReliabilityPolicy,
                           qos_profile_parameters, qos_profile_sensor_data,
                           qos_profile_services_default)
    presets = {'sensor': qos_profile_sensor_data, 'services': qos_profile_services_default,
               'parameters': qos_profile_parameters}
    p = profile(name)
    if name in presets:
        return presets[name]
    return QoSProfile(
        history=HistoryPolicy.KEEP_LAST, depth=p.depth,
        reliability=ReliabilityPolicy.RELIABLE if p.reliable else ReliabilityPolicy.BEST_EFFORT,
        durability=(DurabilityPolicy.TRANSIENT_LOCAL if p.transient_local
                    else DurabilityPolicy.VOLATILE))


class RclpyTimer:
    """rclpy Timer plus the DDS port's `missed` count (periods that passed unserved), counted
    on the timer's own clock (`now` gives its time in ns)."""

    def __init__(self, period_s: float, callback: Callable[[], None],
                 now: Callable[[], int]) -> None:
        if not period_s > 0.0:
            msg = f'timer period must be > 0 s, got {period_s!r}'
            raise TransportError(msg)
        self.missed = 0
        self.timer: Any = None
        self._callback = callback
        self._now = now
        self._period = round(period_s * 1e9)
        self._due = now() + self._period

    def tick(self) -> None:
        now = self._now()
        if now < self._due - self._period:       # ROS time went back: a new schedule
            self._due = now
        behind = max(0, (now - self._due) // self._period)
        self.missed += behind
        self._due += (behind + 1) * self._period
        self._callback()

    def cancel(self) -> None:
        self.timer.cancel()

    def reset(self) -> None:
        self._due = self._now() + self._period
        self.timer.reset()


def _control_executor(context: Any) -> tuple[Any, str]:
    """(executor, its class name) for the control path: EventsExecutor where rclpy has it."""
    try:
        from rclpy.experimental import EventsExecutor
    except ImportError:
        from rclpy.executors import SingleThreadedExecutor
        return SingleThreadedExecutor(context=context), 'SingleThreadedExecutor'
    return EventsExecutor(context=context), 'EventsExecutor'


class RclpyClient:
    def __init__(self, port: RclpyPort, client: Any) -> None:
        self._port = port
        self.client = client

    def wait_for_service(self, timeout_s: float) -> bool:
        return bool(self.client.wait_for_service(timeout_sec=timeout_s))

    def call(self, request: Any, timeout_s: float) -> Any | None:
        future = self.client.call_async(request)
        if self._port.spinning:
            done = threading.Event()
            future.add_done_callback(lambda _: done.set())
            done.wait(timeout_s)
        else:
            self._port.executor.spin_until_future_complete(future, timeout_sec=timeout_s)
        if not future.done():
            self.client.remove_pending_request(future)
            return None
        return future.result()


_STEPS = ('configure', 'cleanup', 'shutdown', 'activate', 'deactivate', 'error')


def _managed_node(node_name: str, log: Callable[[str, str], None]) -> Any:
    """An rclpy.lifecycle.LifecycleNode whose transition callbacks run the node's steps."""
    from rclpy.lifecycle import LifecycleNode, TransitionCallbackReturn

    class ManagedNode(LifecycleNode):
        def __init__(self) -> None:
            self.lifecycle_steps: dict[str, Callable[[], str | None]] = {}
            super().__init__(node_name, automatically_declare_parameters_from_overrides=True)

        def _step(self, name: str) -> Any:
            step = self.lifecycle_steps.get(name)
            if step is None:
                return TransitionCallbackReturn.SUCCESS
            try:
                reason = step()
            except Exception:
                import traceback
                log('error', f'lifecycle: {name} raised (transition error):\n'
                    + traceback.format_exc().rstrip())
                raise            # rclpy turns it into TransitionCallbackReturn.ERROR
            if reason is None:
                return TransitionCallbackReturn.SUCCESS
            log('warn', f'lifecycle: {name} failed: {reason}')
            return TransitionCallbackReturn.FAILURE

        def on_configure(self, state: Any) -> Any:
            return self._step('configure')

        def on_cleanup(self, state: Any) -> Any:
            return self._step('cleanup')

        def on_shutdown(self, state: Any) -> Any:
            return self._step('shutdown')

        def on_activate(self, state: Any) -> Any:
            return self._step('activate')

        def on_deactivate(self, state: Any) -> Any:
            return self._step('deactivate')

        def on_error(self, state: Any) -> Any:
            return self._step('error')

    return ManagedNode()


class RclpyLifecycle:
    """The node's own transition requests (autostart) on rclpy's LifecycleNode."""

    def __init__(self, node: Any, log: Callable[[str, str], None]) -> None:
        self.node = node
        self._log = log

    def trigger(self, label: str) -> bool:
        """LifecycleNode.trigger_<label>(); False when the step failed or the transition is
        not available from the current state."""
        from rclpy.lifecycle import TransitionCallbackReturn
        trigger = getattr(self.node, f'trigger_{label}', None)
        if label not in _STEPS[:5] or trigger is None:
            msg = f'no lifecycle transition {label!r}; use one of {", ".join(_STEPS[:5])}'
            raise TransportError(msg)
        try:
            return trigger() == TransitionCallbackReturn.SUCCESS
        except Exception as exc:  # noqa: BLE001 - rclpy raises RCLError for a transition
            # that is not available from the current state
            self._log('warn', f'lifecycle: {label} is not possible now ({exc})')
            return False


def _rcl_error() -> type[Exception]:
    """rclpy's RCLError (what rcl's failures raise: a RuntimeError), or RuntimeError where
    this rclpy does not expose it."""
    try:
        from rclpy.impl.implementation_singleton import rclpy_implementation
        return rclpy_implementation.RCLError
    except (ImportError, AttributeError):
        return RuntimeError


class RclpyPort:
    """See the module docstring; the methods are those of port.Port."""

    def __init__(self, node_name: str, argv: list[str], *, distro: str = 'jazzy',
                 lifecycle: bool = False) -> None:
        if distro not in DISTROS:
            msg = f'distro {distro!r} is not supported; use one of {", ".join(DISTROS)}'
            raise TransportError(msg)
        import rclpy
        from rclpy.callback_groups import MutuallyExclusiveCallbackGroup, ReentrantCallbackGroup
        from rclpy.executors import MultiThreadedExecutor
        from rclpy.node import Node
        from rclpy.signals import SignalHandlerOptions
        self._rclpy = rclpy
        self.distro = distro
        try:
            rclpy.init(args=list(argv), signal_handler_options=SignalHandlerOptions.NO)
        except _rcl_error() as exc:
            # rcl refused the --ros-args (a missing or bad --params-file, a bad remap): the
            # user's input, reported in rcl's words, not a bug
            msg = f'rclpy could not start with these --ros-args: {" ".join(str(exc).split())}'
            raise TransportError(msg) from exc
        self.native_lifecycle = lifecycle
        self.node = (_managed_node(node_name, self.log) if lifecycle else
                     Node(node_name, automatically_declare_parameters_from_overrides=True))
        self.node_name = self.node.get_name()
        self.namespace = self.node.get_namespace()
        self.types = _types()
        self.executor = MultiThreadedExecutor(num_threads=4)
        self.executor.add_node(self.node)
        self.control_executor, self.control_executor_name = _control_executor(
            self.node.context)
        self._control_node: Any = None      # made with the first control-path entity
        self._control_thread: threading.Thread | None = None
        self._control_lock = threading.Lock()
        self._timer_group = MutuallyExclusiveCallbackGroup()
        self._topic_group = MutuallyExclusiveCallbackGroup()
        self._client_group = ReentrantCallbackGroup()
        self._adoptable = set(self.node.get_parameters_by_prefix(''))
        self._validator: Callable[[dict[str, Any]], tuple[bool, str]] | None = None
        self._listeners: list[Callable[[dict[str, Any]], None]] = []
        self._on_set_added = False
        self._post_set = hasattr(self.node, 'add_post_set_parameters_callback')  # Jazzy
        self._stop = threading.Event()
        self._signals = StopSignals(self._stop.set)
        self.spinning = False
        self._closed = False
        self._faults = FaultLog(self.log)
        self._timer_count = 0

    # --- plain helpers ---------------------------------------------------------------------

    def diagnostic_level(self, level: int) -> object:
        return level if isinstance(level, bytes) else bytes([int(level)])

    def now_ns(self) -> int:
        return int(self.node.get_clock().now().nanoseconds)

    def type_name(self, msg_type: Any) -> str:
        pkg, kind = msg_type.__module__.split('.')[:2]
        return f'{pkg}/{kind}/{msg_type.__name__}'

    def serialize(self, msg: Any) -> bytes:
        from rclpy.serialization import serialize_message
        return bytes(serialize_message(msg))

    def faults(self) -> dict[str, SourceFaults]:
        return self._faults.snapshot()

    def log(self, level: str, text: str) -> None:
        if level not in LOG_LEVELS:
            msg = f'log level {level!r} is unknown; use one of {", ".join(LOG_LEVELS)}'
            raise TransportError(msg)
        # rclpy remembers the severity of each call site (file and line) and raises if one
        # site logs at two severities, so every level needs its own line here.
        logger = self.node.get_logger()
        if level == 'debug':
            logger.debug(text)
        elif level == 'info':
            logger.info(text)
        elif level == 'warn':
            logger.warning(text)
        else:
            logger.error(text)

    # --- entities --------------------------------------------------------------------------

    def create_publisher(self, msg_type: Any, topic: str, qos: str) -> Any:
        return self.node.create_publisher(msg_type, topic, _qos(qos))

    def _control_path(self) -> Any:
        """The hidden node of the control path (module docstring), made on first use."""
        if self._control_node is None:
            from rclpy.node import Node
            from rclpy.parameter import Parameter
            # no ~/get_type_description service either (Jazzy starts one on every node unless
            # this parameter is false; Humble has none and ignores the override)
            self._control_node = Node(
                f'_{self.node_name}_control', namespace=self.namespace,
                context=self.node.context, use_global_arguments=False, enable_rosout=False,
                start_parameter_services=False, parameter_overrides=[
                    Parameter('start_type_description_service', value=False)])
            self.control_executor.add_node(self._control_node)
            self.log('info', f'control path: node {self._control_node.get_name()}, '
                     f'{self.control_executor_name}, its own thread')
            if self.spinning:    # made while spinning (a managed node's configure)
                self._start_control_thread()
        return self._control_node

    def _start_control_thread(self) -> None:
        with self._control_lock:
            if self._control_thread is None:
                self._control_thread = threading.Thread(
                    target=self._spin_executor, args=(self.control_executor,),
                    name=f'{self.node_name}-control', daemon=True)
                self._control_thread.start()

    def create_subscription(self, msg_type: Any, topic: str, callback: Callable[[Any], None],
                            qos: str, *, control: bool = False) -> Any:
        guarded = self._faults.guard(f'subscription {topic}', callback)
        if control:
            return self._control_path().create_subscription(
                msg_type, self.node.resolve_topic_name(topic), guarded, _qos(qos))
        return self.node.create_subscription(msg_type, topic, guarded, _qos(qos),
                                             callback_group=self._topic_group)

    def wait_for_message(self, msg_type: Any, topic: str, qos: str,
                         timeout_s: float) -> tuple[Any | None, str]:
        # rclpy.wait_for_message (Jazzy: keyword qos_profile; Humble's has no QoS argument
        # and would miss a transient local sample, hence refused there)
        from rclpy.wait_for_message import wait_for_message
        name = self.node.resolve_topic_name(topic)
        try:
            ok, msg = wait_for_message(msg_type, self.node, topic, qos_profile=_qos(qos),
                                       time_to_wait=timeout_s)
        except TypeError as err:
            msg = (f'waiting for {name} needs rclpy.wait_for_message with qos_profile '
                   f'(ROS 2 Jazzy or newer): {err}')
            raise TransportError(msg) from None
        return (msg if ok else None), name

    def create_service(self, srv_type: Any, name: str,
                       callback: Callable[[Any, Any], Any]) -> Any:
        return self.node.create_service(
            srv_type, name, self._faults.guard_service(f'service {name}', callback),
            qos_profile=_qos('services'), callback_group=self.node.default_callback_group)

    def destroy_service(self, handle: object) -> None:
        self.node.destroy_service(handle)

    def destroy_publisher(self, publisher: Any) -> None:
        self.node.destroy_publisher(publisher)

    def destroy_subscription(self, subscription: Any) -> None:
        # on the control path's node or on the main node (destroy_* is False for another's)
        control = self._control_node
        if control is None or not control.destroy_subscription(subscription):
            self.node.destroy_subscription(subscription)

    def destroy_timer(self, timer: Any) -> None:
        control = self._control_node
        if control is None or not control.destroy_timer(timer.timer):
            self.node.destroy_timer(timer.timer)

    def serve_lifecycle(self, steps: dict[str, Callable[[], str | None]]) -> RclpyLifecycle:
        """Run ``steps`` (configure, cleanup, shutdown, activate, deactivate, error: each
        returns None or the reason it failed) in the LifecycleNode's transition callbacks."""
        if not self.native_lifecycle:
            msg = 'serve_lifecycle needs a port opened with lifecycle=True'
            raise TransportError(msg)
        unknown = set(steps) - set(_STEPS)
        if unknown:
            msg = f'unknown lifecycle steps {sorted(unknown)}; known: {", ".join(_STEPS)}'
            raise TransportError(msg)
        self.node.lifecycle_steps.update(steps)
        return RclpyLifecycle(self.node, self.log)

    def create_client(self, srv_type: Any, name: str) -> RclpyClient:
        client = self.node.create_client(srv_type, name, qos_profile=_qos('services'),
                                         callback_group=self._client_group)
        return RclpyClient(self, client)

    # --- the ROS graph ---------------------------------------------------------------------

    def get_topic_names_and_types(self) -> list[tuple[str, list[str]]]:
        return self.node.get_topic_names_and_types()

    def count_publishers(self, topic: str) -> int:
        return self.node.count_publishers(topic)

    def get_node_names_and_namespaces(self) -> list[tuple[str, str]]:
        return self.node.get_node_names_and_namespaces()

    def get_service_names_and_types_by_node(self, node_name: str,
                                            node_namespace: str) -> list[tuple[str, list[str]]]:
        return self.node.get_service_names_and_types_by_node(node_name, node_namespace)

    def create_timer(self, period_s: float, callback: Callable[[], None], *,
                     control: bool = False) -> RclpyTimer:
        from rclpy.clock import Clock, ClockType
        clock = (self.node.get_clock() if self.node.get_parameter('use_sim_time').value
                 else Clock(clock_type=ClockType.STEADY_TIME))
        timer = RclpyTimer(period_s, self._faults.guard(f'timer {self._timer_count}', callback),
                           lambda: int(clock.now().nanoseconds))
        self._timer_count += 1
        if control:
            timer.timer = self._control_path().create_timer(period_s, timer.tick, clock=clock)
        else:
            timer.timer = self.node.create_timer(period_s, timer.tick,
                                                 callback_group=self._timer_group, clock=clock)
        return timer

    # --- parameters ------------------------------------------------------------------------

    def declare_parameter(self, name: str, value: Any, description: str = '',
                          read_only: bool = False,
                          value_range: tuple[float, float] | None = None,
                          ignore_override: bool = False) -> Any:
        from rcl_interfaces.msg import FloatingPointRange, ParameterDescriptor
        from rclpy.exceptions import ParameterException
        if isinstance(value, (list, tuple)) and not value:
            msg = (f'parameter {name!r}: an empty list default has no element type; give a '
                   'non-empty default')
            raise TransportError(msg)
        ranges = [] if value_range is None else [FloatingPointRange(
            from_value=float(value_range[0]), to_value=float(value_range[1]), step=0.0)]
        if name in self._adoptable and ignore_override:
            # declared from the launch override at start: drop it, declare the given value
            self._adoptable.discard(name)
            self.node.undeclare_parameter(name)
        if name not in self._adoptable:
            descriptor = ParameterDescriptor(description=description, read_only=read_only,
                                             floating_point_range=ranges)
            try:
                return self.node.declare_parameter(name, value, descriptor,
                                                   ignore_override=ignore_override)
            except ParameterException as exc:   # out of range, refused or of another type
                msg = f'parameter {name!r} rejected: {exc}'
                raise TransportError(msg) from None
        current = self.node.get_parameter(name)
        if self._validator is not None:
            ok, reason = self._validator({name: current.value})
            if not ok:
                msg = f'parameter {name!r} = {current.value!r} rejected: {reason}'
                raise TransportError(msg)
        try:
            self.node.set_descriptor(name, ParameterDescriptor(
                type=current.type_.value, description=description, read_only=read_only,
                floating_point_range=ranges))
        except ParameterException as exc:   # the launch value is out of range
            msg = f'parameter {name!r} = {current.value!r} rejected: {exc}'
            raise TransportError(msg) from None
        self._adoptable.discard(name)
        return self.node.get_parameter(name)

    def undeclare_parameter(self, name: str) -> None:
        from rclpy.exceptions import ParameterImmutableException, ParameterNotDeclaredException
        try:
            self.node.undeclare_parameter(name)
        except (ParameterNotDeclaredException, ParameterImmutableException) as exc:
            msg = f'parameter {name!r} cannot be undeclared: {exc}'
            raise TransportError(msg) from None
        self._adoptable.discard(name)

    def set_parameter(self, name: str, value: Any) -> tuple[bool, str]:
        from rclpy.parameter import Parameter
        (result,) = self.node.set_parameters([Parameter(name, value=value)])
        return bool(result.successful), str(result.reason)

    def get_parameter(self, name: str) -> Any:
        if not self.node.has_parameter(name):
            msg = f'parameter {name!r} is not declared'
            raise TransportError(msg)
        return self.node.get_parameter(name)

    def get_parameters_by_prefix(self, prefix: str) -> dict[str, Any]:
        return dict(self.node.get_parameters_by_prefix(prefix))

    def _on_set(self, params: list[Any]) -> Any:
        from rcl_interfaces.msg import SetParametersResult
        values = {p.name: p.value for p in params}
        try:
            ok, reason = (True, '') if self._validator is None else self._validator(values)
        except Exception as exc:  # noqa: BLE001 - a refusal with a log line, never an exit
            self._report('parameter validator', exc)
            ok, reason = False, f'rejected: the node failed to check it ({exc!r})'
        if ok and not self._post_set:
            self._notify(values)
        return SetParametersResult(successful=bool(ok), reason='' if ok else reason)

    def _post_set_callback(self, params: list[Any]) -> None:
        self._notify({p.name: p.value for p in params})

    def _notify(self, values: dict[str, Any]) -> None:
        for listener in self._listeners:
            try:
                listener(values)
            except Exception as exc:  # noqa: BLE001 - logged; the values stay set
                self._report('parameter listener', exc)

    def _report(self, what: str, exc: BaseException) -> None:
        import traceback
        self.log('error', f'{what} raised (the node goes on):\n'
                 + ''.join(traceback.format_exception(exc)).rstrip())

    def _ensure_on_set(self) -> None:
        if not self._on_set_added:
            self.node.add_on_set_parameters_callback(self._on_set)
            self._on_set_added = True

    def set_parameter_validator(self, callback: Any) -> None:
        self._validator = callback
        self._ensure_on_set()

    def add_parameter_listener(self, callback: Any) -> None:
        if not self._listeners:
            if self._post_set:
                self.node.add_post_set_parameters_callback(self._post_set_callback)
            else:
                self._ensure_on_set()
        self._listeners.append(callback)

    # --- running ---------------------------------------------------------------------------

    def _spin_executor(self, executor: Any) -> None:
        """spin_once until stopped; an exception rclpy raises while taking a sample is
        counted and spinning goes on."""
        from rclpy.executors import ExternalShutdownException
        try:
            while not self._stop.is_set() and self._rclpy.ok(context=self.node.context):
                try:
                    executor.spin_once(timeout_sec=0.1)
                except ExternalShutdownException:
                    raise
                except Exception as exc:  # noqa: BLE001 - a sample rclpy could not take
                    self._faults.dropped('rclpy executor', exc)
        except ExternalShutdownException:
            self._stop.set()

    def spin(self) -> None:
        self._signals.catch()
        self.spinning = True
        if self._control_node is not None:
            self._start_control_thread()
        try:
            self._spin_executor(self.executor)
        finally:
            self._stop.set()
            with self._control_lock:
                control, self._control_thread = self._control_thread, None
            if control is not None:
                control.join()
            self.spinning = False
            self._signals.hold()     # a second signal must not cut the shutdown short

    def shutdown(self) -> None:
        """From a callback: end spin(). Otherwise: also destroy the node and rclpy's context."""
        self._stop.set()
        if self.spinning or self._closed:
            return
        self._closed = True
        try:
            self.control_executor.shutdown()
            if self._control_node is not None:
                self._control_node.destroy_node()
            self.executor.shutdown()
            self.node.destroy_node()
            self._rclpy.try_shutdown()
        finally:
            self._signals.release()
