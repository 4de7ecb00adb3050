"""Every DDS endpoint of our node has USER_DATA, with the type hash on topics (Jazzy).

rmw_cyclonedds_cpp (Iron and later; rmw_node.cpp handle_builtintopic_endpoint, Jazzy sources)
parses the type hash out of the USER_DATA of every discovered endpoint whose topic does not
start with `DCPS`. An endpoint that sent no USER_DATA reaches it as an empty USER_DATA (a null
pointer), and rmw_dds_common::parse_type_hash_from_user_data refuses that: the peer logs
`Failed to parse type hash for topic ... from USER_DATA '(null)'` once per such endpoint. Seen
by hand on a real Jazzy core: every rclpy node and `ros2` command on the domain logged it once
per `constraint-ctrl call/param/echo`, whose graph reader of `ros_discovery_info` had no
USER_DATA. rmw_cyclonedds_cpp writes `typehash=RIHS01_...;` on every reader and writer of a
topic, ros_discovery_info included (ros2-interop.md 4.3); service endpoints carry
`serviceid=`/`clientid=`. Checked with a second participant reading the builtin publication
and subscription topics, as a Jazzy peer does.
"""
from __future__ import annotations

import os
import random
import time

import pytest

pytest.importorskip('cyclonedds')

from constraint_ctrl.transport.dds_qos import tag_value, user_data_of  # noqa: E402
from constraint_ctrl.transport.port import open_port  # noqa: E402

pytestmark = pytest.mark.integration


def _endpoints_of(participant_guid: object, seen: dict[str, bytes], readers: list) -> None:
    for kind, reader in zip(('writer', 'reader'), readers):
        for sample in reader.take(N=10_000):
            if sample.participant_key == participant_guid:
                seen[f'{kind}:{sample.topic_name}:{sample.key}'] = user_data_of(sample.qos)


def test_graph_reader_and_every_endpoint_carry_a_type_hash(
        monkeypatch: pytest.MonkeyPatch) -> None:
    from cyclonedds.builtin import (BuiltinDataReader, BuiltinTopicDcpsPublication,
                                    BuiltinTopicDcpsSubscription)
    from cyclonedds.domain import DomainParticipant
    monkeypatch.setenv('ROS_DOMAIN_ID', str(random.randint(100, 230)))
    node = open_port('dds', 'tagged', ['--ros-args'])
    try:
        t = node.types
        node.create_publisher(t.String, '~/events', 'default')
        node.create_subscription(t.JointState, '/joint_states', lambda m: None, 'sensor')
        node.create_service(t.Trigger, '~/hold', lambda q, r: r)
        node.get_node_names_and_namespaces()        # creates the graph view's readers
        peer = DomainParticipant(int(os.environ['ROS_DOMAIN_ID']))
        readers = [BuiltinDataReader(peer, BuiltinTopicDcpsPublication),
                   BuiltinDataReader(peer, BuiltinTopicDcpsSubscription)]
        guid = node._participant.guid
        seen: dict[str, bytes] = {}
        wanted = {'rt/tagged/events', 'rt/joint_states', 'rq/tagged/holdRequest',
                  'rr/tagged/holdReply'}

        def complete() -> bool:
            names = {key.split(':')[1] for key in seen}
            # ros_discovery_info twice: the discovery writer and the graph view's reader
            return wanted <= names and sum(':ros_discovery_info:' in k for k in seen) >= 2

        deadline = time.monotonic() + 30.0
        while not complete() and time.monotonic() < deadline:
            _endpoints_of(guid, seen, readers)
            time.sleep(0.1)
        assert complete(), sorted(seen)
        ros = {key: data for key, data in seen.items() if ':DCPS' not in key}
        empty = sorted(key for key, data in ros.items() if not data)
        assert not empty, f'endpoints without USER_DATA: {empty}'
        untagged = sorted(key for key, data in ros.items()
                          if key.split(':')[1].startswith(('rt/', 'ros_discovery_info'))
                          and not (tag_value(data, 'typehash') or '').startswith('RIHS01_'))
        assert not untagged, f'topic endpoints without a type hash: {untagged}'
    finally:
        node.shutdown()
