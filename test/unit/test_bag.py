"""Bags written by BagRecorder read back with rosbags' Reader (the outside reference).

Sources: rosbags `rosbag2.Reader` and its ROS 2 type stores (PyPI `rosbags`); rosbag2's
metadata layout (ros2/rosbag2 rosbag2_storage yaml.hpp: version 9 on Jazzy, offered QoS as a
YAML list of names; up to version 8 a YAML string with numeric enums); numeric enum values from
ros2/rmw rmw/include/rmw/types.h (enum order: RELIABLE=1, BEST_EFFORT=2, KEEP_LAST=1,
TRANSIENT_LOCAL=1, VOLATILE=2).
"""
from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml
from rosbags.rosbag2 import Reader
from rosbags.typesys import Stores, get_typestore

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport.bag import BagRecorder
from constraint_ctrl.transport.dds_types import types_for

ROOT = Path(__file__).resolve().parents[2]


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
    (tmp_path / 'plain_file').write_text('not a folder')
    with pytest.raises(TransportError, match='cannot create the bag folder'):
        BagRecorder(tmp_path / 'plain_file' / 'bag')
    with BagRecorder(tmp_path / 'b') as bag:
        with pytest.raises(TransportError, match='call add_topic first'):
            bag.write('/nope', 0, b'')
        with pytest.raises(TransportError, match="type 'my/msg/Thing' is unknown"):
            bag.add_topic('/t', 'my/msg/Thing', 'default')
        bag.add_topic('/t', 'std_msgs/msg/String', 'default')
        with pytest.raises(TransportError, match='added twice'):
            bag.add_topic('/t', 'std_msgs/msg/String', 'default')


@pytest.mark.skipif(os.geteuid() == 0, reason='root may write into any folder')
def test_unwritable_parent_is_a_start_error(tmp_path: Path) -> None:
    locked = tmp_path / 'locked'
    locked.mkdir(mode=0o500)
    try:
        with pytest.raises(TransportError, match='cannot create the bag folder'):
            BagRecorder(locked / 'bag')
    finally:
        locked.chmod(0o700)


@pytest.mark.parametrize(('distro', 'version'), [('jazzy', 9), ('humble', 8)])
def test_metadata_names_the_ros_distro(tmp_path: Path, distro: str, version: int) -> None:
    """rosbag2 records the ROS distro in `ros_distro` (metadata version 8 and later; rosbag2
    rosbag2_storage yaml.hpp); rosbags writes its own name there, we name the distro."""
    path = tmp_path / distro
    with BagRecorder(path, distro=distro) as bag:
        bag.add_topic('/x', 'std_msgs/msg/String', 'default')
        bag.write('/x', 5, bytes(types_for(distro).String(data='a').serialize()))
    meta = _metadata(path)
    assert (meta['version'], meta['ros_distro']) == (version, distro)
    # the copy rosbag2's MCAP plugin reads when metadata.yaml is missing (rosbag2
    # mcap_storage.cpp: metadata record 'rosbag2', key 'serialized_metadata')
    data = (path / f'{distro}.mcap').read_bytes()
    assert f'ros_distro: {distro}'.encode() in data and b'ros_distro: rosbags' not in data
    with Reader(path) as reader:                 # still a bag rosbags reads
        assert reader.message_count == 1


# A child process writes through BagRecorder under a file size limit (RLIMIT_FSIZE): past the
# limit the kernel cuts the write short and then refuses it with EFBIG, as a full disk does
# with ENOSPC. Python ignores SIGXFSZ, so the error arrives as an OSError.
_LIMITED_WRITER = """
import json, resource, sys
from pathlib import Path
from constraint_ctrl.transport.bag import BagRecorder
from constraint_ctrl.transport.dds_types import types_for
path, limit, count = Path(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3])
resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))
t = types_for('jazzy')
failures = []
bag = BagRecorder(path, on_failure=failures.append, queue_size=count)
bag.add_topic('/cmd', 'std_msgs/msg/Float64MultiArray', 'default')
for i in range(count):
    msg = t.Float64MultiArray(data=[float(i)] * 40)
    bag.write('/cmd', 1_000_000_000 + 1000 * i, bytes(msg.serialize()))
bag.close()
print(json.dumps({'written': bag.written, 'dropped': bag.dropped, 'state': bag.state,
                  'error': bag.error, 'failures': failures}))
"""


@pytest.mark.parametrize(('limit', 'count'), [
    (1_500_000, 12_000),     # ~4.2 MB of messages: the second chunk fails while recording
    (300_000, 2_000),        # ~0.7 MB, less than a chunk: the only chunk fails at close()
], ids=['while-recording', 'at-close'])
def test_write_failure_keeps_the_messages_already_on_disk(tmp_path: Path, limit: int,
                                                          count: int) -> None:
    """A write that fails (file size limit, like a full disk): the recorder stops with one
    reported reason, and the bag holds exactly the first messages, complete, with a
    metadata.yaml that rosbags reads; every message is either in it or dropped."""
    path = tmp_path / 'limited'
    out = subprocess.run([sys.executable, '-c', _LIMITED_WRITER, str(path), str(limit),
                          str(count)], capture_output=True, text=True, timeout=120,
                         env={**os.environ, 'PYTHONPATH': str(ROOT)})
    assert out.returncode == 0, out.stderr
    report = json.loads(out.stdout.strip().splitlines()[-1])
    assert report['state'] == 'failed'
    assert len(report['failures']) == 1 and 'File too large' in report['failures'][0]
    assert report['error'] == report['failures'][0]
    assert report['dropped'] > 0
    assert report['written'] > 0 if count > 10_000 else report['written'] == 0
    assert report['written'] + report['dropped'] == count
    assert (path / 'limited.mcap').stat().st_size <= limit
    meta = _metadata(path)
    assert meta['message_count'] == report['written']
    store = get_typestore(Stores.ROS2_JAZZY)
    with Reader(path) as reader:
        values = [(stamp, store.deserialize_cdr(raw, conn.msgtype).data[0])
                  for conn, stamp, raw in reader.messages()]
    # the first `written` messages, in order, none missing and none damaged
    assert values == [(1_000_000_000 + 1000 * i, float(i)) for i in range(report['written'])]


def test_bag_folder_removed_while_recording(tmp_path: Path) -> None:
    """Removing the folder while recording stops the recorder with that reason; close() does
    not raise and does not recreate the folder."""
    t = types_for('jazzy')
    failures: list[str] = []
    path = tmp_path / 'gone'
    bag = BagRecorder(path, on_failure=failures.append)
    bag.add_topic('/cmd', 'std_msgs/msg/Float64MultiArray', 'default')
    data = bytes(t.Float64MultiArray(data=[0.5] * 40).serialize())
    shutil.rmtree(path)
    deadline = time.monotonic() + 60
    i = 0
    while bag.state == 'recording' and time.monotonic() < deadline:
        bag.write('/cmd', i, data)           # about 3 MB until the recorder notices
        i += 1
        if i % 1000 == 0:
            time.sleep(0.01)
    assert bag.state == 'failed', 'the removed folder was never noticed'
    bag.close()
    assert len(failures) == 1 and 'removed' in failures[0], failures
    assert not path.exists()
    assert bag.written == 0 and bag.dropped == i
