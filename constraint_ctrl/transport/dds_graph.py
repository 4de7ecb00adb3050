"""The ROS graph as the DDS port sees it: topics, publishers, nodes and their services.

What rclpy's Node offers as get_topic_names_and_types(), count_publishers(),
get_node_names_and_namespaces() and get_service_names_and_types_by_node(), built the way
rmw_cyclonedds builds its graph cache (ros2-interop.md 4.1, 4.2):

* endpoints come from the DDS built-in topics DCPSPublication and DCPSSubscription (topic name,
  type name, QoS, participant); ROS topics are the ones named `rt/...`, shown without the `rt`
  and with their types demangled (`std_msgs::msg::dds_::String_` -> `std_msgs/msg/String`);
* nodes come only from rmw_dds_common/ParticipantEntitiesInfo samples on `ros_discovery_info`:
  the latest sample of each participant replaces its node list, and a participant that has left
  (no longer alive on DCPSParticipant) has no nodes;
* a node's services are the `rq/<name>Request` readers it lists in its record.

Everything here is a snapshot of what discovery knows at the moment of the call: a peer that
just started may not be in it yet, so callers poll with a timeout. The readers are created on
first use, so a node that never asks pays nothing.
"""
from __future__ import annotations

import threading
from typing import Any

from cyclonedds.builtin import (BuiltinDataReader, BuiltinTopicDcpsParticipant,
                                BuiltinTopicDcpsPublication, BuiltinTopicDcpsSubscription)
from cyclonedds.core import InstanceState, ReadCondition, SampleState, ViewState
from cyclonedds.qos import Policy
from cyclonedds.sub import DataReader
from cyclonedds.topic import Topic

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport.dds_discovery import DISCOVERY_TOPIC
from constraint_ctrl.transport.dds_qos import reader_qos, type_hash_tag
from constraint_ctrl.transport.qos import QosProfile
from constraint_ctrl.transport.ros_args import ros_type_name

#: reader side of ros_discovery_info: ROS readers keep all; a deep keep-last does the same here
_DISCOVERY_READER = QosProfile(depth=1000, reliable=True, transient_local=True)
_TOPIC_PREFIX = 'rt'
_REQUEST_PREFIX, _REQUEST_SUFFIX = 'rq', 'Request'


def _demangle(dds_type: str) -> str:
    try:
        return ros_type_name(dds_type)
    except (TransportError, ValueError):
        return dds_type          # not a ROS type: shown as DDS names it, as rmw does


def _service_type(dds_type: str) -> str:
    """'std_srvs::srv::dds_::Trigger_Request_' -> 'std_srvs/srv/Trigger'."""
    name = _demangle(dds_type)
    for suffix in ('_Request', '_Response'):
        if name.endswith(suffix):
            return name[:-len(suffix)]
    return name


class Graph:
    """Discovery state of one participant (see the module docstring)."""

    def __init__(self, participant: Any, types: Any, distro: str = 'jazzy') -> None:
        self._lock = threading.Lock()
        self._publications = BuiltinDataReader(participant, BuiltinTopicDcpsPublication)
        self._subscriptions = BuiltinDataReader(participant, BuiltinTopicDcpsSubscription)
        self._participants = BuiltinDataReader(participant, BuiltinTopicDcpsParticipant)
        self._alive = {reader: ReadCondition(reader, ViewState.Any | SampleState.Any
                                             | InstanceState.Alive)
                       for reader in (self._publications, self._subscriptions,
                                      self._participants)}
        topic = Topic(participant, DISCOVERY_TOPIC, types.ParticipantEntitiesInfo)
        # tagged like every rmw_cyclonedds endpoint: a Jazzy peer logs a warning for each
        # endpoint that arrives without USER_DATA (test_dds_endpoint_type_hash.py)
        self._discovery = DataReader(participant, topic, reader_qos(
            _DISCOVERY_READER, type_hash_tag('rmw_dds_common/msg/ParticipantEntitiesInfo',
                                             distro)))
        self._records: dict[bytes, Any] = {}    # participant GUID -> its latest record

    def _endpoints(self, reader: BuiltinDataReader) -> list[Any]:
        return list(reader.read(N=1_000_000, condition=self._alive[reader]))

    def _topics(self, reader: BuiltinDataReader) -> list[tuple[str, Any]]:
        """(ROS topic name, endpoint) of every alive `rt/` endpoint."""
        return [(e.topic_name[len(_TOPIC_PREFIX):], e) for e in self._endpoints(reader)
                if e.topic_name.startswith(_TOPIC_PREFIX + '/')]

    def topic_names_and_types(self) -> list[tuple[str, list[str]]]:
        """[(topic, [types])] of every publisher and subscription, sorted (rclpy's shape)."""
        found: dict[str, set[str]] = {}
        for reader in (self._publications, self._subscriptions):
            for name, endpoint in self._topics(reader):
                found.setdefault(name, set()).add(_demangle(endpoint.type_name))
        return [(name, sorted(types)) for name, types in sorted(found.items())]

    def publishers(self, topic: str) -> list[tuple[str, bool, bool]]:
        """(type, reliable, transient local) of each publisher on the fully qualified topic."""
        result = []
        for name, endpoint in self._topics(self._publications):
            if name == topic:
                reliability = endpoint.qos[Policy.Reliability]
                durability = endpoint.qos[Policy.Durability]
                result.append((_demangle(endpoint.type_name),
                               isinstance(reliability, Policy.Reliability.Reliable),
                               durability == Policy.Durability.TransientLocal))
        return result

    def count_publishers(self, topic: str) -> int:
        return len(self.publishers(topic))

    def _node_records(self) -> list[Any]:
        alive = {p.key.bytes for p in self._endpoints(self._participants)}
        with self._lock:
            for sample in self._discovery.take(N=10_000):
                gid = bytes(getattr(getattr(sample, 'gid', None), 'data', b''))[:16]
                if gid:
                    self._records[gid] = sample
            return [record for gid, record in self._records.items() if gid in alive]

    def node_names_and_namespaces(self) -> list[tuple[str, str]]:
        """[(name, namespace)] of every node announced on ros_discovery_info, sorted."""
        found = {(info.node_name, info.node_namespace)
                 for record in self._node_records() for info in record.node_entities_info_seq}
        return sorted(found)

    def service_names_and_types_by_node(self, node_name: str,
                                        namespace: str) -> list[tuple[str, list[str]]]:
        """[(service, [types])] the node serves: its request readers, as its record lists
        them (rclpy: Node.get_service_names_and_types_by_node)."""
        readers: set[bytes] = set()
        for record in self._node_records():
            for info in record.node_entities_info_seq:
                if (info.node_name, info.node_namespace) == (node_name, namespace):
                    readers.update(bytes(g.data)[:16] for g in info.reader_gid_seq)
        found: dict[str, set[str]] = {}
        for endpoint in self._endpoints(self._subscriptions):
            name = endpoint.topic_name
            if (endpoint.key.bytes in readers and name.startswith(_REQUEST_PREFIX + '/')
                    and name.endswith(_REQUEST_SUFFIX)):
                service = name[len(_REQUEST_PREFIX):-len(_REQUEST_SUFFIX)]
                found.setdefault(service, set()).add(_service_type(endpoint.type_name))
        return [(name, sorted(types)) for name, types in sorted(found.items())]


__all__ = ['Graph']
