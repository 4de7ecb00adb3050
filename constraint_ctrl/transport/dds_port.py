"""The port over Cyclone DDS directly: a ROS 2 node without a ROS install.

Speaks rmw_cyclonedds_cpp's wire protocol: `rt/` topics with `pkg::msg::dds_::Name_` types
in XCDR1, services on `rq/...Request` / `rr/...Reply` with its 16-byte request header, the
standard parameter services under `~/`, ParameterEvent on /parameter_events, and node
visibility through `ros_discovery_info`.

Limits to know:
* Topics interoperate with any ROS 2 RMW. Services (ours and the parameter services) can only
  be called by peers on rmw_cyclonedds_cpp (RMW_IMPLEMENTATION=rmw_cyclonedds_cpp); other RMWs
  frame requests differently.
* Networking: loopback only unless CYCLONEDDS_URI is set (see dds_discovery.py for the default
  and how to override it); domain from ROS_DOMAIN_ID.
* Not provided: /rosout (logs go to stderr in ROS's console format), type hashes in USER_DATA,
  simulated time (use_sim_time exists, as on every rclpy node, but only False is honoured).

Threads: subscriptions are dispatched on one thread, services (including parameter services)
on another, and each timer has its own, so a timer tick can run at the same time as a
subscription or service callback (guard shared state with a lock). Callbacks only run while
spin() runs. An exception escaping a subscription or timer callback ends spin() and is
re-raised from it, as an exception in an rclpy callback ends executor.spin(); one escaping a
service callback (ours or the parameter services) is logged and answered with an error reply
instead, so a bad request never ends the node. SIGINT and SIGTERM end spin(); from then until
shutdown() has finished they are only counted (transport/signals.py).
"""
from __future__ import annotations

import sys
import threading
import time
import traceback
from collections.abc import Callable
from typing import Any

from cyclonedds.domain import DomainParticipant
from cyclonedds.pub import DataWriter
from cyclonedds.qos import Policy, Qos
from cyclonedds.sub import DataReader
from cyclonedds.topic import Topic
from cyclonedds.util import duration

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport.dds_discovery import NodeAnnouncer, domain_id, ensure_cyclone_config
from constraint_ctrl.transport.dds_dispatch import Dispatcher, FixedRateTimer
from constraint_ctrl.transport.dds_parameters import ParameterStore
from constraint_ctrl.transport.dds_qos import reader_qos, type_hash_tag, writer_qos
from constraint_ctrl.transport.dds_services import ServiceClient, ServiceServer
from constraint_ctrl.transport.dds_types import ros_type_of, types_for
from constraint_ctrl.transport.port import DISTROS, LOG_LEVELS, ParameterView
from constraint_ctrl.transport.qos import PROFILES, profile
from constraint_ctrl.transport.signals import StopSignals
from constraint_ctrl.transport.ros_args import (node_fqn, node_identity, overrides_for,
                                                parse_ros_args, resolve_name, topic_dds_name,
                                                validate_node_name)

_PARAMETER_SERVICES = (
    ('describe_parameters', 'DescribeParameters', 'on_describe_parameters'),
    ('get_parameters', 'GetParameters', 'on_get_parameters'),
    ('get_parameter_types', 'GetParameterTypes', 'on_get_parameter_types'),
    ('list_parameters', 'ListParameters', 'on_list_parameters'),
    ('set_parameters', 'SetParameters', 'on_set_parameters'),
    ('set_parameters_atomically', 'SetParametersAtomically', 'on_set_parameters_atomically'),
)
_ACK_WAIT_S = 0.5


def delete_entity(entity: Any) -> None:
    """Delete a DDS entity now, so peers see it go (cyclonedds-python otherwise deletes on
    garbage collection; its __del__ is idempotent, so a later collection does nothing)."""
    entity.__del__()


class DdsPublisher:
    def __init__(self, writer: DataWriter, msg_type: type, name: str) -> None:
        self.writer = writer
        self.name = name
        self._type = msg_type

    @property
    def topic_name(self) -> str:
        """The fully qualified topic name after remapping, as rclpy's Publisher.topic_name."""
        return self.name

    def publish(self, msg: Any) -> None:
        if not isinstance(msg, self._type):
            text = (f'publisher {self.name}: message is {type(msg).__name__}, expected '
                    f'{ros_type_of(self._type)}')
            raise TransportError(text)
        self.writer.write(msg)


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
        self.types = types_for(distro)
        args = parse_ros_args(list(argv))
        self.node_name, self.namespace = node_identity(args, validate_node_name(node_name))
        self.fqn = node_fqn(self.namespace, self.node_name)
        self._remaps = args.remaps
        level = args.log_level or 'info'  # 'fatal' silences all our levels
        self._log_threshold = LOG_LEVELS.index(level) if level in LOG_LEVELS else len(LOG_LEVELS)
        self._log_lock = threading.Lock()
        ensure_cyclone_config()
        self._participant = DomainParticipant(domain_id(),
                                              qos=Qos(Policy.Userdata(data=b'enclave=/;')))
        self._topics: dict[str, Topic] = {}
        self._writers: list[DataWriter] = []
        self._timers: list[FixedRateTimer] = []
        self._stop = threading.Event()
        self._signals = StopSignals(self._stop.set)
        self._failure: tuple[str, BaseException] | None = None
        self._spinning = False
        self._closed = False
        self._topic_dispatch = Dispatcher(self._participant, f'{self.node_name}-topics',
                                          self._callback_failed)
        self._service_dispatch = Dispatcher(self._participant, f'{self.node_name}-services',
                                            self._callback_failed)
        self._announcer = NodeAnnouncer(self._participant, self.types, self.namespace,
                                         self.node_name)
        events = self.create_publisher(self.types.ParameterEvent, '/parameter_events',
                                       'parameters')
        self._params = ParameterStore(self.fqn, overrides_for(args, self.fqn), self.types,
                                      self.now_ns, events.publish, log=self.log)
        # rclpy's TimeSource declares use_sim_time on every node; keep the same parameter set
        if self._params.declare('use_sim_time', False).value is not False:
            self.log('warn', 'use_sim_time is not supported by the DDS port; stamps and timers '
                             'use the system and monotonic clocks')
        for suffix, type_name, handler in _PARAMETER_SERVICES:
            self._add_service(getattr(self.types, type_name), f'~/{suffix}',
                              getattr(self._params, handler), 'parameters')

    # --- plain helpers ---------------------------------------------------------------------

    def diagnostic_level(self, level: int) -> object:
        return level[0] if isinstance(level, (bytes, bytearray)) else int(level)

    def now_ns(self) -> int:
        return time.time_ns()

    def type_name(self, msg_type: Any) -> str:
        return ros_type_of(msg_type)

    def serialize(self, msg: Any) -> bytes:
        return bytes(msg.serialize())

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
        fqn, dds_topic = self._topic(msg_type, topic)
        tag = type_hash_tag(ros_type_of(msg_type), self.distro)
        writer = DataWriter(self._participant, dds_topic, writer_qos(profile(qos), tag))
        self._writers.append(writer)
        self._announcer.update(writers=(writer,))
        return DdsPublisher(writer, msg_type, fqn)

    def create_subscription(self, msg_type: Any, topic: str, callback: Callable[[Any], None],
                            qos: str) -> DdsSubscription:
        fqn, dds_topic = self._topic(msg_type, topic)
        tag = type_hash_tag(ros_type_of(msg_type), self.distro)
        reader = DataReader(self._participant, dds_topic, reader_qos(profile(qos), tag))
        self._topic_dispatch.add(reader, callback, f'subscription {fqn}')
        self._announcer.update(readers=(reader,))
        return DdsSubscription(reader, fqn)

    # --- services --------------------------------------------------------------------------

    def _add_service(self, srv_type: Any, name: str, callback: Callable[[Any, Any], Any],
                     qos: str) -> ServiceServer:
        fqn = resolve_name(name, self.node_name, self.namespace, self._remaps)
        server = ServiceServer(self._participant, srv_type, fqn, callback, profile(qos),
                               on_error=self.log)
        self._service_dispatch.add(server.reader, server.handle, f'service {fqn}')
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

    def create_client(self, srv_type: Any, name: str) -> ServiceClient:
        fqn = resolve_name(name, self.node_name, self.namespace, self._remaps)
        client = ServiceClient(self._participant, srv_type, fqn, PROFILES['services'])
        self._announcer.update(readers=(client.reader,), writers=(client.writer,))
        return client

    # --- timers ----------------------------------------------------------------------------

    def create_timer(self, period_s: float, callback: Callable[[], None]) -> FixedRateTimer:
        timer = FixedRateTimer(period_s, callback, self._callback_failed,
                               name=f'{self.node_name}-timer{len(self._timers)}')
        self._timers.append(timer)
        if self._spinning:
            timer.start()
        return timer

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

    # --- running ---------------------------------------------------------------------------

    def _callback_failed(self, label: str, exc: BaseException) -> None:
        if self._failure is None:
            self._failure = (label, exc)
        detail = ''.join(traceback.format_exception(exc)).rstrip()
        self.log('error', f'{label} raised; stopping spin():\n{detail}')
        self._stop.set()

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
        if self._failure is not None:
            label, exc = self._failure
            msg = f'node {self.fqn}: {label} raised {exc!r}'
            raise TransportError(msg) from exc

    def shutdown(self) -> None:
        """From a callback: end spin(). Otherwise: also withdraw the node and close DDS."""
        self._stop.set()
        if self._spinning or self._closed:
            return
        self._closed = True
        for timer in self._timers:
            timer.cancel()
        self._topic_dispatch.stop()
        self._service_dispatch.stop()
        self._announcer.withdraw()
        deadline = time.monotonic() + _ACK_WAIT_S
        for writer in [*self._writers, self._announcer.writer]:
            left = deadline - time.monotonic()
            if left > 0:
                writer.wait_for_acks(duration(seconds=left))
        delete_entity(self._participant)   # and with it every entity of the node
        self._signals.release()
