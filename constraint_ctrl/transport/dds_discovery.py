"""How the DDS port finds peers and how ROS 2 tools find the node.

Peers: Cyclone reads its configuration from the CYCLONEDDS_URI environment variable when the
first participant is created. If the user has not set it, the port sets LOOPBACK_CONFIG:
loopback only (127.0.0.1), no multicast (Linux `lo` has no MULTICAST flag), unicast discovery
to participant-index ports on localhost — the same shape rmw_cyclonedds generates for
ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST, so ROS nodes started with that setting (or, on
Humble, ROS_LOCALHOST_ONLY=1) see the port. To reach other hosts, or ROS nodes using the
default subnet discovery, set CYCLONEDDS_URI yourself, e.g.
`export CYCLONEDDS_URI='<CycloneDDS><Domain Id="any"><General><Interfaces><NetworkInterface
name="eth0"/></Interfaces></General></Domain></CycloneDDS>'`. The domain is ROS_DOMAIN_ID
(default 0), as in ROS.

Nodes: `ros2 node list` is built only from rmw_dds_common/ParticipantEntitiesInfo samples on
the DDS topic `ros_discovery_info` (reliable, transient local, keep last 1). Each sample holds
the participant GID and, per node, the GIDs of its readers and writers; receivers replace
their whole view of the participant with every sample, so the complete state is sent after
every change and an empty node list before the participant goes away. A GID is the 16-byte
DDS GUID (zero-padded to 24 bytes on Humble).
"""
from __future__ import annotations

import os
import threading
import weakref
from typing import Any

from cyclonedds.pub import DataWriter
from cyclonedds.topic import Topic

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport import dds_raw
from constraint_ctrl.transport.dds_qos import type_hash_tag, writer_qos
from constraint_ctrl.transport.dds_types import codec_of
from constraint_ctrl.transport.qos import DISCOVERY_INFO

LOOPBACK_CONFIG = (
    '<CycloneDDS><Domain Id="any">'
    '<General><Interfaces><NetworkInterface address="127.0.0.1"/></Interfaces>'
    '<AllowMulticast>false</AllowMulticast></General>'
    '<Discovery><ParticipantIndex>auto</ParticipantIndex>'
    '<MaxAutoParticipantIndex>32</MaxAutoParticipantIndex>'
    '<Peers><Peer address="127.0.0.1"/></Peers></Discovery>'
    '</Domain></CycloneDDS>')
DISCOVERY_TOPIC = 'ros_discovery_info'


def ensure_cyclone_config() -> bool:
    """Set CYCLONEDDS_URI to LOOPBACK_CONFIG unless the user set it; True if we set it."""
    if os.environ.get('CYCLONEDDS_URI'):
        return False
    os.environ['CYCLONEDDS_URI'] = LOOPBACK_CONFIG
    return True


def domain_id() -> int:
    text = os.environ.get('ROS_DOMAIN_ID', '').strip()
    if not text:
        return 0
    try:
        value = int(text)
    except ValueError:
        value = -1
    if not 0 <= value <= 232:
        msg = f'ROS_DOMAIN_ID={text!r} must be an integer in 0..232'
        raise TransportError(msg)
    return value


def gid_of(entity: Any, gid_type: type) -> Any:
    return gid_type(data=entity.guid.bytes.ljust(len(gid_type().data), b'\0'))


class NodeAnnouncer:
    """Keeps `ros_discovery_info` in step with the node's readers and writers.

    Endpoints are keyed by GUID; one whose Python object is garbage collected (a client the
    node dropped) leaves the record with the next update.
    """

    def __init__(self, participant: Any, types: Any, namespace: str, node_name: str,
                 distro: str) -> None:
        self._participant = participant
        self._types = types
        self._namespace = namespace
        self._node_name = node_name
        self._lock = threading.Lock()
        self._readers: dict[bytes, Any] = {}
        self._writers: dict[bytes, Any] = {}
        self._dead: list[bytes] = []
        topic = Topic(participant, DISCOVERY_TOPIC, types.ParticipantEntitiesInfo)
        self.writer = DataWriter(participant, topic, writer_qos(
            DISCOVERY_INFO, type_hash_tag('rmw_dds_common/msg/ParticipantEntitiesInfo', distro)))

    def update(self, *, readers: tuple[Any, ...] = (), writers: tuple[Any, ...] = (),
               removed: tuple[Any, ...] = ()) -> None:
        with self._lock:
            for table, entities in ((self._readers, readers), (self._writers, writers)):
                for entity in entities:
                    key = entity.guid.bytes
                    table[key] = gid_of(entity, self._types.Gid)
                    weakref.finalize(entity, self._dead.append, key)
            gone = [entity.guid.bytes for entity in removed]
            while self._dead:
                gone.append(self._dead.pop())
            for key in gone:
                self._readers.pop(key, None)
                self._writers.pop(key, None)
            sample = self.sample()
            dds_raw.write(self.writer, codec_of(type(sample)).encode(sample))

    def sample(self, *, with_node: bool = True) -> Any:
        t = self._types
        nodes = [t.NodeEntitiesInfo(node_namespace=self._namespace, node_name=self._node_name,
                                    reader_gid_seq=list(self._readers.values()),
                                    writer_gid_seq=list(self._writers.values()))]
        return t.ParticipantEntitiesInfo(gid=gid_of(self._participant, t.Gid),
                                         node_entities_info_seq=nodes if with_node else [])

    def withdraw(self) -> None:
        """Announce that the participant has no nodes any more."""
        with self._lock:
            sample = self.sample(with_node=False)
            dds_raw.write(self.writer, codec_of(type(sample)).encode(sample))
