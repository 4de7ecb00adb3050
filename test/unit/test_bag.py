"""Bags written by BagRecorder read back with rosbags' Reader (the outside reference).

Sources: rosbags `rosbag2.Reader` and its ROS 2 type stores (PyPI `rosbags`); rosbag2's
metadata layout (ros2/rosbag2 rosbag2_storage yaml.hpp: version 9 on Jazzy, offered QoS as a
YAML list of names; up to version 8 a YAML string with numeric enums); numeric enum values from
ros2/rmw rmw/include/rmw/types.h (enum order: RELIABLE=1, BEST_EFFORT=2, KEEP_LAST=1,
TRANSIENT_LOCAL=1, VOLATILE=2).
"""
from __future__ import annotations

from pathlib import Path

import pytest
import yaml
from rosbags.rosbag2 import Reader
from rosbags.typesys import Stores, get_typestore

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport.bag import BagRecorder
from constraint_ctrl.transport.dds_types import types_for


def _metadata(path: Path) -> dict:
    return yaml.safe_load((path / 'metadata.yaml').read_text())['rosbag2_bagfile_information']


def test_jazzy_bag_round_trip(tmp_path: Path) -> None:
    """Topics, types, counts and contents come back through rosbags' Reader."""
    t = types_for('jazzy')
    path = tmp_path / 'run'
    with BagRecorder(path) as bag:
        bag.add_topic('/joint_states', 'sensor_msgs/msg/JointState', 'sensor')
        bag.add_topic('/ctrl/status', 'diagnostic_msgs/msg/DiagnosticArray', 'status')
        for i in range(5):
            msg = t.JointState(name=['joint_1', 'joint_2'], position=[0.1 * i, -0.2 * i])
            bag.write('/joint_states', 1_000_000_000 + i * 10_000_000, bytes(msg.serialize()))
        status = t.DiagnosticArray(status=[t.DiagnosticStatus(level=1, name='ctrl',
                                                              message='slow tick')])
        bag.write('/ctrl/status', 1_000_000_005, bytes(status.serialize()))
    assert (bag.written, bag.dropped) == (6, 0)

    store = get_typestore(Stores.ROS2_JAZZY)
    with Reader(path) as reader:
        topics = {c.topic: (c.msgtype, c.msgcount) for c in reader.connections}
        assert topics == {'/joint_states': ('sensor_msgs/msg/JointState', 5),
                          '/ctrl/status': ('diagnostic_msgs/msg/DiagnosticArray', 1)}
        assert reader.message_count == 6
        messages = [(c.topic, stamp, store.deserialize_cdr(raw, c.msgtype))
                    for c, stamp, raw in reader.messages()]
    joint = [(stamp, list(m.position)) for topic, stamp, m in messages
             if topic == '/joint_states']
    assert joint[3] == (1_030_000_000, [pytest.approx(0.3), pytest.approx(-0.6)])
    names = [m.name for topic, _, m in messages if topic == '/joint_states']
    assert names == [['joint_1', 'joint_2']] * 5
    diag = next(m for topic, _, m in messages if topic == '/ctrl/status')
    assert (diag.status[0].level, diag.status[0].message) == (1, 'slow tick')

    meta = _metadata(path)
    assert meta['version'] == 9
    assert meta['storage_identifier'] == 'mcap'
    assert meta['relative_file_paths'] == ['run.mcap']
    qos = {t['topic_metadata']['name']: t['topic_metadata']['offered_qos_profiles'][0]
           for t in meta['topics_with_message_count']}
    assert (qos['/joint_states']['reliability'], qos['/joint_states']['depth']) == \
        ('best_effort', 5)
    assert (qos['/ctrl/status']['durability'], qos['/ctrl/status']['depth']) == \
        ('transient_local', 1)


def test_humble_bag_is_version_8_with_humble_range(tmp_path: Path) -> None:
    """Humble reads metadata up to version 8; Range without `variance` (Humble store)."""
    t = types_for('humble')
    path = tmp_path / 'humble'
    with BagRecorder(path, distro='humble') as bag:
        bag.add_topic('/range_left', 'sensor_msgs/msg/Range', 'default')
        bag.write('/range_left', 42, bytes(t.Range(radiation_type=1, range=0.5).serialize()))
    meta = _metadata(path)
    assert (meta['version'], meta['storage_identifier']) == (8, 'mcap')
    profiles = yaml.safe_load(meta['topics_with_message_count'][0]['topic_metadata']
                              ['offered_qos_profiles'])   # a YAML string up to version 8
    assert (profiles[0]['reliability'], profiles[0]['durability'], profiles[0]['history']) == \
        (1, 2, 1)
    store = get_typestore(Stores.ROS2_HUMBLE)
    with Reader(path) as reader:
        (conn, stamp, raw), = list(reader.messages())
        msg = store.deserialize_cdr(raw, conn.msgtype)
    assert (stamp, msg.radiation_type, msg.range) == (42, 1, 0.5)


def test_write_never_blocks_and_counts_drops(tmp_path: Path) -> None:
    """With the writer thread stalled, write() returns at once and counts what it drops."""
    t = types_for('jazzy')
    bag = BagRecorder(tmp_path / 'full', queue_size=3)
    bag.add_topic('/x', 'std_msgs/msg/Float64', 'default')
    data = bytes(t.Float64(data=1.0).serialize())
    with bag._lock:  # stall the writer thread inside its next write
        accepted = [bag.write('/x', i, data) for i in range(20)]
        assert accepted.count(False) == bag.dropped
        assert 20 - 3 - 1 <= bag.dropped <= 20 - 3   # queue of 3 (+1 taken by the thread)
    bag.close()
    assert bag.written + bag.dropped == 20
    assert bag.write('/x', 99, data) is False        # closed: dropped, not raised
    with Reader(tmp_path / 'full') as reader:
        assert reader.message_count == bag.written


def test_recorder_errors_are_actionable(tmp_path: Path) -> None:
    (tmp_path / 'exists').mkdir()
    with pytest.raises(TransportError, match='must not exist'):
        BagRecorder(tmp_path / 'exists')
    with BagRecorder(tmp_path / 'b') as bag:
        with pytest.raises(TransportError, match='call add_topic first'):
            bag.write('/nope', 0, b'')
        with pytest.raises(TransportError, match="type 'my/msg/Thing' is unknown"):
            bag.add_topic('/t', 'my/msg/Thing', 'default')
        bag.add_topic('/t', 'std_msgs/msg/String', 'default')
        with pytest.raises(TransportError, match='added twice'):
            bag.add_topic('/t', 'std_msgs/msg/String', 'default')
