"""Record serialized messages into a rosbag2 (MCAP storage + metadata.yaml) without ROS.

Writing goes through the PyPI `rosbags` writer on a background thread fed by a bounded queue:
`write()` never blocks the control tick; when the queue is full the message is dropped and
counted in `dropped`. Metadata version 9 is what Jazzy writes; Humble's reader cannot parse
version 9 (its offered_qos_profiles field is a string up to version 8), so distro='humble'
writes version 8. Message blobs are full CDR samples with the 4-byte encapsulation header
(port.serialize gives exactly that).
"""
from __future__ import annotations

import queue
import threading
from pathlib import Path
from typing import Any

from rosbags.interfaces import (Qos, QosDurability, QosHistory, QosLiveliness, QosReliability,
                                QosTime)
from rosbags.rosbag2 import StoragePlugin, Writer, WriterError
from rosbags.typesys import Stores, get_typestore

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport.qos import profile

_VERSIONS = {'jazzy': 9, 'humble': 8}
_STORES = {'jazzy': Stores.ROS2_JAZZY, 'humble': Stores.ROS2_HUMBLE}
_UNSET = QosTime(sec=0, nsec=0)  # deadline/lifespan/lease left at the ROS default
_CLOSE = object()


def bag_qos(name: str) -> Qos:
    """One of our named profiles as rosbag2's offered QoS record."""
    p = profile(name)
    return Qos(
        history=QosHistory.KEEP_LAST, depth=p.depth,
        reliability=QosReliability.RELIABLE if p.reliable else QosReliability.BEST_EFFORT,
        durability=QosDurability.TRANSIENT_LOCAL if p.transient_local else QosDurability.VOLATILE,
        deadline=_UNSET, lifespan=_UNSET, liveliness=QosLiveliness.AUTOMATIC,
        liveliness_lease_duration=_UNSET, avoid_ros_namespace_conventions=False)


class BagRecorder:
    """rosbag2 writer that never blocks its caller; use as a context manager or call close()."""

    def __init__(self, path: Path, *, distro: str = 'jazzy', queue_size: int = 10_000) -> None:
        if distro not in _VERSIONS:
            msg = f'bag distro {distro!r} is not supported; use one of {", ".join(_VERSIONS)}'
            raise TransportError(msg)
        self.path = Path(path)
        self.dropped = 0
        self.written = 0
        self._typestore = get_typestore(_STORES[distro])
        try:
            self._writer = Writer(self.path, version=_VERSIONS[distro],
                                  storage_plugin=StoragePlugin.MCAP)
            self._writer.open()
        except WriterError as exc:
            msg = f'bag {str(self.path)!r}: {exc} (the directory must not exist yet)'
            raise TransportError(msg) from None
        self._connections: dict[str, Any] = {}
        self._lock = threading.Lock()
        self._queue: queue.Queue[Any] = queue.Queue(maxsize=queue_size)
        self._error: BaseException | None = None
        self._closed = False
        self._thread = threading.Thread(target=self._run, name='bag-writer', daemon=True)
        self._thread.start()

    def add_topic(self, topic: str, ros_type: str, qos: str) -> None:
        """Register a topic before writing to it; ros_type like 'sensor_msgs/msg/JointState'."""
        if ros_type not in self._typestore.types:
            msg = (f'bag topic {topic}: type {ros_type!r} is unknown to the rosbags type store; '
                   "use a standard type name like 'sensor_msgs/msg/JointState'")
            raise TransportError(msg)
        with self._lock:
            if topic in self._connections:
                msg = f'bag topic {topic} was added twice'
                raise TransportError(msg)
            self._connections[topic] = self._writer.add_connection(
                topic, ros_type, typestore=self._typestore, offered_qos_profiles=[bag_qos(qos)])

    def write(self, topic: str, stamp_ns: int, cdr: bytes) -> bool:
        """Queue one message; False (and `dropped` += 1) when the queue is full or closed."""
        connection = self._connections.get(topic)
        if connection is None:
            msg = f'bag topic {topic} was not added (call add_topic first)'
            raise TransportError(msg)
        if self._closed or self._error is not None:
            self.dropped += 1
            return False
        try:
            self._queue.put_nowait((connection, stamp_ns, cdr))
        except queue.Full:
            self.dropped += 1
            return False
        return True

    def _run(self) -> None:
        while True:
            item = self._queue.get()
            if item is _CLOSE:
                return
            if self._error is not None:
                continue
            connection, stamp_ns, cdr = item
            try:
                with self._lock:
                    self._writer.write(connection, stamp_ns, cdr)
                self.written += 1
            except Exception as exc:  # noqa: BLE001 - kept and re-raised by close()
                self._error = exc

    def close(self) -> None:
        """Write what is queued, then metadata.yaml; raises if a write had failed."""
        if self._closed:
            return
        self._closed = True
        self._queue.put(_CLOSE)
        self._thread.join()
        self._writer.close()
        if self._error is not None:
            msg = f'bag {str(self.path)!r}: writing failed: {self._error!r}'
            raise TransportError(msg) from self._error

    def __enter__(self) -> BagRecorder:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
