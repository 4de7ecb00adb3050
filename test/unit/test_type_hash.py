"""Endpoint USER_DATA `typehash=RIHS01_<sha256>;` as rmw_cyclonedds writes it from Iron on.

Reference value: ros2-interop.md section 4.3, the RIHS01 hash of sensor_msgs/msg/JointState
that a real Jazzy `ros2 topic info /joint_states --verbose` printed (and rosbags computes).
"""
from __future__ import annotations

from constraint_ctrl.transport.dds_qos import type_hash_tag, writer_qos
from constraint_ctrl.transport.dds_types import MESSAGES
from constraint_ctrl.transport.qos import PROFILES

JOINT_STATE = 'RIHS01_a13ee3a330e346c9d87b5aa18d24e11690752bd33a0350f11c5882bc9179260e'


def test_jazzy_joint_state_hash_matches_a_real_jazzy_value() -> None:
    assert type_hash_tag('sensor_msgs/msg/JointState', 'jazzy') == \
        f'typehash={JOINT_STATE};'.encode()


def test_humble_has_no_type_hashes() -> None:
    assert type_hash_tag('sensor_msgs/msg/JointState', 'humble') == b''


def test_every_offered_message_has_a_hash_on_jazzy() -> None:
    for name in MESSAGES:
        tag = type_hash_tag(name, 'jazzy')
        assert tag.startswith(b'typehash=RIHS01_') and len(tag) == len(b'typehash=RIHS01_;') + 64


def test_the_tag_lands_in_the_writer_user_data() -> None:
    from cyclonedds.qos import Policy
    tag = type_hash_tag('rcl_interfaces/msg/Log', 'jazzy')
    assert writer_qos(PROFILES['default'], tag)[Policy.Userdata].data == tag
