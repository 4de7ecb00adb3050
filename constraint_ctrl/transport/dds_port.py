"""The port over Cyclone DDS directly: a ROS 2 node without a ROS install.

Speaks rmw_cyclonedds_cpp's wire protocol: `rt/` topics with `pkg::msg::dds_::Name_` types
in XCDR1, services on `rq/...Request` / `rr/...Reply` with its 16-byte request header, the
standard parameter services under `~/`, ParameterEvent on /parameter_events, log lines on
/rosout, node visibility through `ros_discovery_info`, and simulated time from /clock when
use_sim_time is true. Samples are encoded and decoded by cdr.py (a few microseconds for the
control loop's messages) and written/taken as bytes (dds_raw.py).

Limits to know:
* Topics interoperate with any ROS 2 RMW. Services (ours and the parameter services) can only
  be called by peers on rmw_cyclonedds_cpp (RMW_IMPLEMENTATION=rmw_cyclonedds_cpp); other RMWs
  frame requests differently.
* Networking: loopback only unless CYCLONEDDS_URI is set (see dds_discovery.py for the default
  and how to override it); domain from ROS_DOMAIN_ID.
* Not provided: the logger-level services.

Time: `now_ns()` is ROS time (dds_time.py): the system clock, or with use_sim_time true the
latest /clock time (0 before the first). A timer created while use_sim_time is true runs on
ROS time and does not fire while /clock stands still; one created while it is false runs on
the monotonic clock.

Logs go to stderr in ROS's console format and, as rcl_interfaces/Log, to /rosout (reliable,
transient local, depth 1000, lifespan 10 s, as rcl's rosout publisher), with the rcl logger
name of the node (namespace and name joined by dots) and the caller's file, function, line.

Threads: subscriptions are dispatched on one thread, services (including parameter services)
on another, and each timer has its own, so a timer tick can run at the same time as a
subscription or service callback (guard shared state with a lock). Callbacks only run while
spin() runs. A sample that cannot be decoded is dropped; an exception raised by a callback is
caught; both are counted per source (`faults()`) and logged at most once a minute per source,
and spin() goes on (receive_faults.py); a service callback that raises also gives the caller an
error reply. This differs from rclpy, where an exception in a
callback ends executor.spin(): the nodes already turn their own failures into safe outputs,
and one bad sample from a peer must not end the node. SIGINT and SIGTERM end spin(); from
then until shutdown() has finished they are only counted (transport/signals.py).
"""
from __future__ import annotations

import os
import sys
import threading
import time
from collections.abc import Callable
from typing import Any

from cyclonedds.core import DDSException
from cyclonedds.domain import DomainParticipant
from cyclonedds.pub import DataWriter
from cyclonedds.qos import Policy, Qos
from cyclonedds.sub import DataReader
from cyclonedds.topic import Topic
from cyclonedds.util import duration

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport import dds_raw
from constraint_ctrl.transport.dds_discovery import (NodeAnnouncer, confine_to_loopback, domain_id,
                                                     ensure_cyclone_config, socket_inodes)
from constraint_ctrl.transport.dds_dispatch import Dispatcher, FixedRateTimer
from constraint_ctrl.transport.dds_graph import Graph
from constraint_ctrl.transport.dds_parameters import ParameterStore
from constraint_ctrl.transport.dds_qos import reader_qos, type_hash_tag, writer_qos
from constraint_ctrl.transport.dds_services import ServiceClient, ServiceServer
from constraint_ctrl.transport.dds_time import RosClock
from constraint_ctrl.transport.dds_types import codec_of, ros_type_of, types_for
from constraint_ctrl.transport.port import DISTROS, LOG_LEVELS, ParameterView
from constraint_ctrl.transport.qos import CLOCK, PROFILES, ROSOUT, QosProfile, profile
from constraint_ctrl.transport.receive_faults import FaultLog, SourceFaults
from constraint_ctrl.transport.ros_args import (expand_name, node_fqn, node_identity,
                                                overrides_for, parse_ros_args, resolve_name,
                                                topic_dds_name, validate_node_name)
from constraint_ctrl.transport.signals import StopSignals

_PARAMETER_SERVICES = (
    ('describe_parameters', 'DescribeParameters', 'on_describe_parameters'),
    ('get_parameters', 'GetParameters', 'on_get_parameters'),
    ('get_parameter_types', 'GetParameterTypes', 'on_get_parameter_types'),
    ('list_parameters', 'ListParameters', 'on_list_parameters'),
    ('set_parameters', 'SetParameters', 'on_set_parameters'),
    ('set_parameters_atomically', 'SetParametersAtomically', 'on_set_parameters_atomically'),
)
_ACK_WAIT_S = 0.5
_DESTROY_ACK_WAIT_S = 0.2


def delete_entity(entity: Any) -> None:
    """Delete a DDS entity now, so peers see it go (cyclonedds-python otherwise deletes on
    garbage collection; its __del__ is idempotent, so a later collection does nothing)."""
    entity.__del__()


def wait_for_acks(writer: DataWriter, seconds: float) -> bool:
    """True when every matched reliable reader acknowledged all the writer's data in time.

    A reader that vanished without unmatching (its process killed) never acknowledges, so the
    wait ends by its timeout; cyclonedds-python 11.0.1 then raises AttributeError instead of
    returning False (cyclonedds/pub.py, DataWriter.wait_for_acks, compares the return code with
    `Exception.DDS_RETCODE_TIMEOUT`). Other failures still raise DDSException."""
    try:
        return bool(writer.wait_for_acks(duration(seconds=seconds)))
    except AttributeError:
        return False


#: rcl_interfaces/Log severities (rcl_interfaces/msg/Log.msg constants) of our log levels.
_ROSOUT_LEVELS = {'debug': 10, 'info': 20, 'warn': 30, 'error': 40}


class DdsPublisher:
    def __init__(self, writer: DataWriter, msg_type: type, name: str) -> None:
        self.writer = writer
        self.name = name
        self._type = msg_type
        self._encode = codec_of(msg_type).encode

    @property
    def topic_name(self) -> str:
        """The fully qualified topic name after remapping, as rclpy's Publisher.topic_name."""
        return self.name

    def publish(self, msg: Any) -> None:
        if not isinstance(msg, self._type):
            text = (f'publisher {self.name}: message is {type(msg).__name__}, expected '
                    f'{ros_type_of(self._type)}')
            raise TransportError(text)
        dds_raw.write(self.writer, self._encode(msg))


class DdsSubscription:
    def __init__(self, reader: DataReader, name: str) -> None:
        self.reader = reader
        self.name = name

    @property
    def topic_name(self) -> str:
        """The fully qualified topic name after remapping, as rclpy's Subscription.topic_name."""
        return self.name


class DdsPort:
    """See the module docstring; the methods are those of port.Port."""

    def __init__(self, node_name: str, argv: list[str], *, distro: str = 'jazzy') -> None:
        if distro not in DISTROS:
            msg = f'distro {distro!r} is not supported; use one of {", ".join(DISTROS)}'
            raise TransportError(msg)
        self.distro = distro
        self.native_lifecycle = False   # nodes/lifecycle.py serves the lifecycle services
        self.types = types_for(distro)
        args = parse_ros_args(list(argv))
        self.node_name, self.namespace = node_identity(args, validate_node_name(node_name))
        self.fqn = node_fqn(self.namespace, self.node_name)
        self._remaps = args.remaps
        level = args.log_level or 'info'  # 'fatal' silences all our levels
        self._log_threshold = LOG_LEVELS.index(level) if level in LOG_LEVELS else len(LOG_LEVELS)
        self._log_lock = threading.Lock()
        self._logger_name = '.'.join([*self.namespace.strip('/').split('/'), self.node_name]
                                     ).lstrip('.')
        self._rosout: DdsPublisher | None = None
        self._clock = RosClock()
        self._clock_subscription: DdsSubscription | None = None
        self._faults = FaultLog(self.log)
        ours = ensure_cyclone_config()
        sockets_before = socket_inodes()
        self._participant = DomainParticipant(domain_id(),
                                              qos=Qos(Policy.Userdata(data=b'enclave=/;')))
        if ours:
            _, problem = confine_to_loopback(sockets_before)
            if problem:
                self.log('warn', f'DDS receive sockets stay on the any-address ({problem}); '
                                 'the node may receive from other hosts')
        self._topics: dict[str, Topic] = {}
        self._writers: list[DataWriter] = []
        self._timers: list[FixedRateTimer] = []
        self._stop = threading.Event()
        self._signals = StopSignals(self._stop.set)
        self._spinning = False
        self._closed = False
        self._graph: Graph | None = None
        self._topic_dispatch = Dispatcher(self._participant, f'{self.node_name}-topics',
                                          self._faults)
        self._service_dispatch = Dispatcher(self._participant, f'{self.node_name}-services',
                                            self._faults)
        self._announcer = NodeAnnouncer(self._participant, self.types, self.namespace,
                                         self.node_name, distro)
        self._rosout = self._publisher(self.types.Log, '/rosout', ROSOUT)
        events = self.create_publisher(self.types.ParameterEvent, '/parameter_events',
                                       'parameters')
        self._params = ParameterStore(self.fqn, overrides_for(args, self.fqn), self.types,
                                      self.now_ns, events.publish, log=self.log)
        # rclpy's TimeSource declares use_sim_time on every node and follows its changes
        self._set_sim_time(self._params.declare('use_sim_time', False).value)
        self._params.add_listener(self._on_parameters)
        for suffix, type_name, handler in _PARAMETER_SERVICES:
            self._add_service(getattr(self.types, type_name), f'~/{suffix}',
                              getattr(self._params, handler), 'parameters')

    # --- plain helpers ---------------------------------------------------------------------

    def diagnostic_level(self, level: int) -> object:
        return level[0] if isinstance(level, (bytes, bytearray)) else int(level)

    def now_ns(self) -> int:
        return self._clock.now_ns()

    def type_name(self, msg_type: Any) -> str:
        return ros_type_of(msg_type)

    def serialize(self, msg: Any) -> bytes:
        return codec_of(type(msg)).encode(msg)

    def faults(self) -> dict[str, SourceFaults]:
        return self._faults.snapshot()

    def log(self, level: str, text: str) -> None:
        if level not in LOG_LEVELS:
            msg = f'log level {level!r} is unknown; use one of {", ".join(LOG_LEVELS)}'
            raise TransportError(msg)
        if LOG_LEVELS.index(level) < self._log_threshold:
            return
        now = time.time_ns()
        line = (f'[{level.upper()}] [{now // 1_000_000_000}.{now % 1_000_000_000:09d}] '
                f'[{self.node_name}]: {text}\n')
        with self._log_lock:
            sys.stderr.write(line)
            sys.stderr.flush()
        rosout = self._rosout
        if rosout is None or self._closed:
            return
        caller = sys._getframe(1)
        t = self.types
        try:   # stamp: the wall clock, as rcutils stamps log records
            rosout.publish(t.Log(
                stamp=t.Time(sec=now // 1_000_000_000, nanosec=now % 1_000_000_000),
                level=_ROSOUT_LEVELS[level], name=self._logger_name, msg=text,
                file=os.path.basename(caller.f_code.co_filename),
                function=caller.f_code.co_name, line=caller.f_lineno))
        except (DDSException, TransportError):
            pass   # participant going away, or text that is not valid Unicode: stderr has it

    # --- topics ----------------------------------------------------------------------------

    def _topic(self, msg_type: Any, name: str) -> tuple[str, Topic]:
        ros_type_of(msg_type)  # rejects non-ROS types with a clear message
        fqn = resolve_name(name, self.node_name, self.namespace, self._remaps)
        dds_name = topic_dds_name(fqn)
        topic = self._topics.get(dds_name)
        if topic is None:
            topic = self._topics[dds_name] = Topic(self._participant, dds_name, msg_type)
        elif topic.data_type is not msg_type:
            msg = (f'topic {fqn} is already used with {ros_type_of(topic.data_type)}, not '
                   f'{ros_type_of(msg_type)}')
            raise TransportError(msg)
        return fqn, topic

    def create_publisher(self, msg_type: Any, topic: str, qos: str) -> DdsPublisher:
        return self._publisher(msg_type, topic, profile(qos))

    def _publisher(self, msg_type: Any, topic: str, qos: QosProfile) -> DdsPublisher:
        fqn, dds_topic = self._topic(msg_type, topic)
        tag = type_hash_tag(ros_type_of(msg_type), self.distro)
        writer = DataWriter(self._participant, dds_topic, writer_qos(qos, tag))
        self._writers.append(writer)
        self._announcer.update(writers=(writer,))
        return DdsPublisher(writer, msg_type, fqn)

    def create_subscription(self, msg_type: Any, topic: str, callback: Callable[[Any], None],
                            qos: str, *, control: bool = False) -> DdsSubscription:
        # control: nothing to do here; every subscription is dispatched on the one topic
        # thread, which nothing but subscriptions uses (services have their own)
        return self._subscription(msg_type, topic, callback, profile(qos))

    def _subscription(self, msg_type: Any, topic: str, callback: Callable[[Any], None],
                      qos: QosProfile) -> DdsSubscription:
        fqn, dds_topic = self._topic(msg_type, topic)
        tag = type_hash_tag(ros_type_of(msg_type), self.distro)
        reader = DataReader(self._participant, dds_topic, reader_qos(qos, tag))
        self._topic_dispatch.add(reader, codec_of(msg_type).decode,
                                 lambda msg, _info: callback(msg), f'subscription {fqn}')
        self._announcer.update(readers=(reader,))
        return DdsSubscription(reader, fqn)

    def wait_for_message(self, msg_type: Any, topic: str, qos: str,
                         timeout_s: float) -> tuple[Any | None, str]:
        """A temporary reader polled every 20 ms (no spin needed); deleted afterwards."""
        fqn, dds_topic = self._topic(msg_type, topic)
        tag = type_hash_tag(ros_type_of(msg_type), self.distro)
        reader = DataReader(self._participant, dds_topic, reader_qos(profile(qos), tag))
        decode = codec_of(msg_type).decode
        deadline = time.monotonic() + max(0.0, timeout_s)
        try:
            while True:
                for data, info in dds_raw.take(reader, 1):
                    if info.valid_data:
                        return decode(data), fqn
                if time.monotonic() >= deadline or self._stop.is_set():
                    return None, fqn
                time.sleep(0.02)
        finally:
            delete_entity(reader)

    # --- services --------------------------------------------------------------------------

    def _add_service(self, srv_type: Any, name: str, callback: Callable[[Any, Any], Any],
                     qos: str) -> ServiceServer:
        fqn = resolve_name(name, self.node_name, self.namespace, self._remaps)
        server = ServiceServer(self._participant, srv_type, fqn,
                               self._faults.guard_service(f'service {fqn}', callback),
                               profile(qos))
        self._service_dispatch.add(server.reader, server.decode, server.handle,
                                   f'service {fqn}')
        self._announcer.update(readers=(server.reader,), writers=(server.writer,))
        return server

    def create_service(self, srv_type: Any, name: str,
                       callback: Callable[[Any, Any], Any]) -> ServiceServer:
        return self._add_service(srv_type, name, callback, 'services')

    def destroy_service(self, handle: object) -> None:
        if not isinstance(handle, ServiceServer):
            msg = f'destroy_service: {handle!r} is not a service created by this port'
            raise TransportError(msg)
        handle.closed = True
        self._service_dispatch.remove(handle.reader)
        self._announcer.update(removed=(handle.reader, handle.writer))
        delete_entity(handle.reader)
        delete_entity(handle.writer)

    def destroy_publisher(self, publisher: DdsPublisher) -> None:
        if not isinstance(publisher, DdsPublisher) or publisher.writer not in self._writers:
            msg = f'destroy_publisher: {publisher!r} is not a publisher of this port'
            raise TransportError(msg)
        self._writers.remove(publisher.writer)
        try:   # readers get what it wrote last (a final zero command) before it goes
            wait_for_acks(publisher.writer, _DESTROY_ACK_WAIT_S)
        except DDSException:
            pass
        self._announcer.update(removed=(publisher.writer,))
        delete_entity(publisher.writer)

    def destroy_subscription(self, subscription: DdsSubscription) -> None:
        if not isinstance(subscription, DdsSubscription):
            msg = f'destroy_subscription: {subscription!r} is not a subscription of this port'
            raise TransportError(msg)
        self._topic_dispatch.remove(subscription.reader)
        self._announcer.update(removed=(subscription.reader,))
        delete_entity(subscription.reader)

    def create_client(self, srv_type: Any, name: str) -> ServiceClient:
        fqn = resolve_name(name, self.node_name, self.namespace, self._remaps)
        client = ServiceClient(self._participant, srv_type, fqn, PROFILES['services'])
        self._announcer.update(readers=(client.reader,), writers=(client.writer,))
        return client

    # --- timers ----------------------------------------------------------------------------

    def create_timer(self, period_s: float, callback: Callable[[], None], *,
                     control: bool = False) -> FixedRateTimer:
        # control: nothing to do here; every timer has its own thread
        timer = FixedRateTimer(period_s, callback, self._faults,
                               name=f'timer {len(self._timers)}',
                               clock=self._clock if self._clock.sim_time else None)
        self._timers.append(timer)
        if self._spinning:
            timer.start()
        return timer

    def destroy_timer(self, timer: FixedRateTimer) -> None:
        if timer not in self._timers:
            msg = f'destroy_timer: {timer!r} is not a timer of this port'
            raise TransportError(msg)
        timer.cancel()
        self._timers.remove(timer)

    # --- parameters ------------------------------------------------------------------------

    def declare_parameter(self, name: str, value: Any, description: str = '',
                          read_only: bool = False,
                          value_range: tuple[float, float] | None = None,
                          ignore_override: bool = False) -> ParameterView:
        return self._params.declare(name, value, description, read_only, value_range,
                                    ignore_override)

    def undeclare_parameter(self, name: str) -> None:
        self._params.undeclare(name)

    def set_parameter(self, name: str, value: Any) -> tuple[bool, str]:
        return self._params.set_atomically({name: value})

    def get_parameter(self, name: str) -> ParameterView:
        return self._params.get(name)

    def get_parameters_by_prefix(self, prefix: str) -> dict[str, ParameterView]:
        return self._params.by_prefix(prefix)

    def set_parameter_validator(self, callback: Any) -> None:
        self._params.set_validator(callback)

    def add_parameter_listener(self, callback: Any) -> None:
        self._params.add_listener(callback)

    # --- the ROS graph (rclpy Node's graph queries; dds_graph.py) ----------------------------

    def _graph_view(self) -> Graph:
        if self._graph is None:
            self._graph = Graph(self._participant, self.types, self.distro)
        return self._graph

    def get_topic_names_and_types(self) -> list[tuple[str, list[str]]]:
        return self._graph_view().topic_names_and_types()

    def count_publishers(self, topic: str) -> int:
        """As rclpy: the name is expanded against this node, not remapped."""
        return self._graph_view().count_publishers(
            expand_name(topic, self.node_name, self.namespace))

    def get_node_names_and_namespaces(self) -> list[tuple[str, str]]:
        return self._graph_view().node_names_and_namespaces()

    def get_service_names_and_types_by_node(self, node_name: str,
                                            node_namespace: str) -> list[tuple[str, list[str]]]:
        return self._graph_view().service_names_and_types_by_node(node_name, node_namespace)

    def publisher_qos(self, topic: str) -> list[tuple[str, bool, bool]]:
        """DDS port only: (type, reliable, transient local) of each publisher on the topic
        (expanded as in count_publishers), so a reader can pick a QoS that matches them."""
        return self._graph_view().publishers(expand_name(topic, self.node_name, self.namespace))

    # --- simulated time ---------------------------------------------------------------------

    def _on_parameters(self, values: dict[str, Any]) -> None:
        if 'use_sim_time' in values:
            self._set_sim_time(values['use_sim_time'])

    def _set_sim_time(self, active: Any) -> None:
        """Follow use_sim_time: subscribe to /clock (best effort, depth 1, as rclpy's
        TimeSource) the first time it is true; ROS time is /clock's while it stays true."""
        active = bool(active)
        if active and self._clock_subscription is None:
            self._clock_subscription = self._subscription(
                self.types.Clock, '/clock', self._on_clock, CLOCK)
        self._clock.use_sim_time(active)

    def time_generation(self) -> int:
        """Changes whenever ROS time jumps back or changes source (dds_time.RosClock); the
        frames buffer clears its timed transforms then, as tf2_ros.Buffer does."""
        return self._clock.generation

    def _on_clock(self, msg: Any) -> None:
        self._clock.on_clock(msg.clock.sec * 1_000_000_000 + msg.clock.nanosec)

    # --- running ---------------------------------------------------------------------------

    def spin(self) -> None:
        if self._closed:
            msg = f'node {self.fqn}: spin() after shutdown()'
            raise TransportError(msg)
        self._signals.catch()
        self._spinning = True
        self._topic_dispatch.start()
        self._service_dispatch.start()
        for timer in self._timers:
            timer.start()
        try:
            while not self._stop.wait(0.1):
                pass
        finally:
            self._spinning = False
            for timer in self._timers:
                timer.stop()
            self._topic_dispatch.stop()
            self._service_dispatch.stop()
            self._signals.hold()     # a second signal must not cut the shutdown short

    def shutdown(self) -> None:
        """From a callback: end spin(). Otherwise: also withdraw the node and close DDS."""
        self._stop.set()
        if self._spinning or self._closed:
            return
        self._closed = True
        for timer in self._timers:
            timer.cancel()
        self._clock.wake()
        self._topic_dispatch.stop()
        self._service_dispatch.stop()
        self._announcer.withdraw()
        deadline = time.monotonic() + _ACK_WAIT_S
        for writer in [*self._writers, self._announcer.writer]:
            left = deadline - time.monotonic()
            if left > 0:
                try:
                    wait_for_acks(writer, left)   # a reader that never acknowledges: timeout
                except DDSException:
                    pass                          # the shutdown goes on regardless
        delete_entity(self._participant)   # and with it every entity of the node
        self._signals.release()
