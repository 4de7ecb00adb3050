"""Our named QoS profiles as cyclonedds-python QoS, set the way rmw_cyclonedds sets them.

rmw_cyclonedds (create_readwrite_qos): reliable with infinite max blocking time, keep-last
history, autodispose off on writers, a durability service for transient-local writers, and
XCDR1 as the only data representation. Always pass explicit QoS: plain DDS defaults differ
from ROS's.
"""
from __future__ import annotations

import functools

from cyclonedds.qos import Policy, Qos
from cyclonedds.util import duration

from constraint_ctrl.transport.qos import QosProfile


def _common(p: QosProfile, user_data: bytes) -> list[object]:
    policies: list[object] = [
        Policy.History.KeepLast(p.depth),
        (Policy.Reliability.Reliable(max_blocking_time=duration(infinite=True)) if p.reliable
         else Policy.Reliability.BestEffort),
        Policy.Durability.TransientLocal if p.transient_local else Policy.Durability.Volatile,
        Policy.DataRepresentation(use_cdrv0_representation=True),
    ]
    if user_data:
        policies.append(Policy.Userdata(data=user_data))
    if p.lifespan_s > 0:
        policies.append(Policy.Lifespan(duration(seconds=p.lifespan_s)))
    return policies


@functools.cache
def type_hash_tag(ros_type: str, distro: str) -> bytes:
    """Endpoint USER_DATA ``typehash=RIHS01_<sha256>;`` as rmw_cyclonedds_cpp writes it since
    Iron (ros2-interop.md 4.3); ROS only displays it, but without it a Jazzy peer logs a
    warning per endpoint. Humble has no type hashes: empty. Hashes come from rosbags' type
    store (checked against a real Jazzy value for sensor_msgs/msg/JointState)."""
    if distro == 'humble':
        return b''
    from rosbags.typesys import Stores, get_typestore
    try:
        value = get_typestore(Stores.ROS2_JAZZY).hash_rihs01(ros_type)
    except Exception:  # noqa: BLE001 - a type rosbags does not know: no tag, as on Humble
        return b''
    return f'typehash={value};'.encode()


def writer_qos(p: QosProfile, user_data: bytes = b'') -> Qos:
    policies = _common(p, user_data)
    policies.append(Policy.WriterDataLifecycle(autodispose=False))
    if p.transient_local:
        policies.append(Policy.DurabilityService(
            cleanup_delay=0, history=Policy.History.KeepLast(p.depth), max_samples=-1,
            max_instances=-1, max_samples_per_instance=-1))
    return Qos(*policies)


def reader_qos(p: QosProfile, user_data: bytes = b'') -> Qos:
    return Qos(*_common(p, user_data))


def user_data_of(qos: Qos | None) -> bytes:
    """USER_DATA bytes of a discovered endpoint's QoS (b'' when absent)."""
    if qos is None:
        return b''
    policy = qos[Policy.Userdata]
    return policy.data if policy is not None else b''


def tag_value(user_data: bytes, key: str) -> str | None:
    """Value of `key=value;` in rmw_cyclonedds-style USER_DATA, or None."""
    for item in user_data.decode('utf-8', 'replace').split(';'):
        name, sep, value = item.partition('=')
        if sep and name.strip() == key:
            return value
    return None
