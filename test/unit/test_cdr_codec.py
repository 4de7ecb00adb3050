"""The DDS port's CDR codec (transport/cdr.py) against rosbags' serialiser, on random messages.

Outside reference: rosbags' ROS 2 CDR serialize_cdr / deserialize_cdr (cdr_reference.py). For
every message and service-body type the port offers, on both distros, hypothesis builds random
messages from rosbags' field definitions; the codec must write exactly rosbags' bytes, read
rosbags' little- and big-endian bytes back to the same message, and agree with rosbags on
what it reads. The hot types (JointState, Float64MultiArray, Range, WrenchStamped,
PointStamped) get more and larger examples. Edge cases: empty sequences, long and non-ASCII
strings, names that change between samples (the codec keeps the last list of names), and
samples that must be refused (invalid UTF-8, truncated, a count that cannot fit, a missing
NUL, another encapsulation) without reading past the sample.
"""
from __future__ import annotations

import math
import struct
from typing import Any

import pytest
from cdr_reference import STORES, fields_of, plain, reference_name, rosbags_bytes
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from rosbags.interfaces import Nodetype

from constraint_ctrl.transport.cdr import CdrError
from constraint_ctrl.transport.dds_types import SERVICES, codec_of, types_for

HOT = ('sensor_msgs/msg/JointState', 'std_msgs/msg/Float64MultiArray', 'sensor_msgs/msg/Range',
       'geometry_msgs/msg/WrenchStamped', 'geometry_msgs/msg/PointStamped')
# `byte` is an octet in ROS 2 (0..255, ros2-interop.md section 7); rosbags packs it as a signed
# int8, so random values stay where both readings agree.
INT_RANGES = {'int8': (-2**7, 2**7 - 1), 'uint8': (0, 2**8 - 1), 'byte': (0, 127),
              'char': (0, 255), 'int16': (-2**15, 2**15 - 1), 'uint16': (0, 2**16 - 1),
              'int32': (-2**31, 2**31 - 1), 'uint32': (0, 2**32 - 1),
              'int64': (-2**63, 2**63 - 1), 'uint64': (0, 2**64 - 1)}


def classes(distro: str) -> dict[str, type]:
    """Our message classes by reference-store name: every type of the port's namespace (nested
    types included) and the service bodies."""
    found: dict[str, type] = {}
    for value in vars(types_for(distro)).values():
        for cls in ((value,) if isinstance(value, type) else (value.Request, value.Response)):
            found[reference_name(cls)] = cls
    return found


def value_strategy(desc: Any, distro: str, big: bool) -> st.SearchStrategy[Any]:
    kind, detail = desc
    if kind == Nodetype.BASE:
        base, bound = detail
        if base == 'string':
            text = st.text(max_size=bound or (40 if big else 8))
            return text.filter(lambda s: len(s.encode()) <= bound) if bound else text
        if base == 'bool':
            return st.booleans()
        if base == 'float32':
            return st.floats(width=32)
        if base == 'float64':
            return st.floats()
        low, high = INT_RANGES[base]
        return st.integers(low, high)
    if kind == Nodetype.NAME:
        return message_strategy(detail, distro, big)
    (sub_kind, sub_detail), size = desc[1]
    element = value_strategy((sub_kind, sub_detail), distro, big)
    octets = sub_kind == Nodetype.BASE and sub_detail[0] in ('uint8', 'byte', 'char')
    if kind == Nodetype.ARRAY:
        if octets:
            return st.binary(min_size=size, max_size=size)
        return st.lists(element, min_size=size, max_size=size)
    limit = size or (12 if big else 3)
    return st.lists(element, max_size=limit)


def message_strategy(name: str, distro: str, big: bool = False) -> st.SearchStrategy[Any]:
    cls = classes(distro)[name]
    fields = fields_of(STORES[distro], name)
    if not fields:
        return st.just(cls())
    return st.builds(cls, **{field: value_strategy(desc, distro, big) for field, desc in fields})


def check_against_rosbags(msg: Any, distro: str) -> None:
    """Our bytes == rosbags' bytes; both byte orders decode to the message; rosbags reads ours
    to the same values."""
    codec = codec_of(type(msg))
    name = reference_name(type(msg))
    ours = codec.encode(msg)
    assert ours == rosbags_bytes(msg, distro), name
    expected = plain(msg)
    assert plain(codec.decode(ours)) == expected
    assert plain(codec.decode(rosbags_bytes(msg, distro, little_endian=False))) == expected
    assert codec.encode(codec.decode(ours)) == ours
    theirs = plain(STORES[distro].deserialize_cdr(ours, name))
    if fields_of(STORES[distro], name):
        assert theirs == expected


ALL = [(distro, name) for distro in ('jazzy', 'humble') for name in sorted(classes(distro))]


@pytest.mark.parametrize(('distro', 'name'), ALL)
@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_random_messages_match_rosbags(distro: str, name: str, data: st.DataObject) -> None:
    check_against_rosbags(data.draw(message_strategy(name, distro)), distro)


@pytest.mark.parametrize('distro', ['jazzy', 'humble'])
@pytest.mark.parametrize('name', HOT)
@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_hot_messages_match_rosbags(distro: str, name: str, data: st.DataObject) -> None:
    """More and larger examples for the messages of the control loop; several in a row
    through one codec, as a subscription sees them (the codec keeps the last names)."""
    messages = data.draw(st.lists(message_strategy(name, distro, big=True), min_size=1,
                                  max_size=4))
    for msg in messages:
        check_against_rosbags(msg, distro)


def test_every_offered_type_is_covered() -> None:
    """The random test walks every type of the port (messages, nested types, service bodies)."""
    for distro in ('jazzy', 'humble'):
        names = set(classes(distro))
        t = types_for(distro)
        assert {cls.__ros_type__ for cls in vars(t).values() if isinstance(cls, type)} <= names
        for srv in SERVICES:
            pkg, _, short = srv.split('/')
            assert {f'{pkg}/msg/{short}_Request', f'{pkg}/msg/{short}_Response'} <= names
    assert {'jazzy', 'humble'} == {d for d, _ in ALL}


# ----------------------------------------------------------------------------- edge cases

def _joint_state(t: Any, names: list[str], **kw: Any) -> Any:
    n = len(names)
    return t.JointState(header=t.Header(stamp=t.Time(sec=1, nanosec=2), frame_id='base'),
                        name=names, position=kw.get('position', [0.5] * n),
                        velocity=kw.get('velocity', []), effort=kw.get('effort', []))


@pytest.mark.parametrize('distro', ['jazzy', 'humble'])
def test_empty_long_and_non_ascii(distro: str) -> None:
    t = types_for(distro)
    for msg in (t.JointState(), t.Float64MultiArray(), t.MarkerArray(),
                _joint_state(t, ['j' * 10_000, 'ß', '関節_1', '🤖 arm', '']),
                t.String(data='é' * 5000), t.Log(name='n', msg='\u0394 x')):
        check_against_rosbags(msg, distro)


def test_names_that_change_between_samples_are_read_correctly() -> None:
    """The kept list of names must never be returned for different bytes (same lengths,
    another order, another byte order, another count)."""
    t = types_for('jazzy')
    codec = codec_of(t.JointState)
    samples = [['a1', 'b2'], ['a1', 'b2'], ['b2', 'a1'], ['a1', 'b3'], ['a1'], ['a1', 'b2', 'c']]
    for names in samples:
        msg = _joint_state(t, names)
        decoded = codec.decode(rosbags_bytes(msg, 'jazzy'))
        assert decoded.name == names
        decoded.name.append('mutated')                      # callers may change their copy
        assert codec.decode(rosbags_bytes(msg, 'jazzy', little_endian=False)).name == names


def test_a_list_changed_in_place_is_written_anew() -> None:
    t = types_for('jazzy')
    codec = codec_of(t.JointState)
    names = ['joint_1', 'joint_2']
    msg = _joint_state(t, names)
    first = codec.encode(msg)
    names[1] = 'joint_9'                                    # same list object, new content
    second = codec.encode(msg)
    assert first != second
    assert second == rosbags_bytes(msg, 'jazzy')
    assert codec.decode(second).name == ['joint_1', 'joint_9']


def test_numpy_arrays_and_tuples_are_accepted_for_sequences() -> None:
    """Nodes may pass numpy arrays or tuples; the bytes are those of the equal list."""
    import numpy as np
    t = types_for('jazzy')
    codec = codec_of(t.Float64MultiArray)
    as_list = t.Float64MultiArray(data=[0.25, -1.0, 3.5])
    for data in (np.array([0.25, -1.0, 3.5]), np.array([0.25, -1.0, 3.5], dtype=np.float32),
                 (0.25, -1.0, 3.5)):
        assert codec.encode(t.Float64MultiArray(data=data)) == codec.encode(as_list)
    with pytest.raises(CdrError, match='1-d'):
        codec.encode(t.Float64MultiArray(data=np.zeros((2, 3))))


def _valid(t: Any) -> bytes:
    return codec_of(t.JointState).encode(_joint_state(t, ['joint_1', 'joint_2']))


def test_invalid_utf8_is_refused() -> None:
    """A valid CDR sample carrying bytes that are not UTF-8 (rosbags refuses it as well)."""
    t = types_for('jazzy')
    data = bytearray(_valid(t))
    index = data.index(b'joint_1')
    data[index:index + 2] = b'\xff\xfe'
    with pytest.raises(CdrError, match='JointState'):
        codec_of(t.JointState).decode(bytes(data))
    with pytest.raises(Exception):  # noqa: B017 - the reference refuses it too
        STORES['jazzy'].deserialize_cdr(bytes(data), 'sensor_msgs/msg/JointState')


def test_malformed_samples_are_refused() -> None:
    t = types_for('jazzy')
    codec = codec_of(t.JointState)
    good = _valid(t)
    cases = {
        'truncated': good[:-5],
        'header only': good[:4],
        'empty': b'',
        'xcdr2': b'\x00\x07\x00\x00' + good[4:],           # CDR2_LE: not what ROS writes
        'parameter list': b'\x00\x03\x00\x00' + good[4:],  # PL_CDR_LE
    }
    name_count_at = 4 + 8 + 4 + len('base') + 1 + 3       # after stamp and frame_id (+pad)
    huge = bytearray(good)
    huge[name_count_at:name_count_at + 4] = struct.pack('<I', 2**32 - 1)
    cases['count beyond the sample'] = bytes(huge)
    no_nul = bytearray(good)
    no_nul[good.index(b'joint_1') + 7] = ord('x')
    cases['string without NUL'] = bytes(no_nul)
    zero_length = bytearray(good)
    zero_length[4 + 8:4 + 12] = bytes(4)                    # frame_id length 0
    cases['string of length 0'] = bytes(zero_length)
    for label, data in cases.items():
        with pytest.raises(CdrError):
            codec.decode(data)
        assert label


def test_encoding_errors_name_the_type() -> None:
    t = types_for('jazzy')
    with pytest.raises(CdrError, match='sensor_msgs/msg/JointState'):
        codec_of(t.JointState).encode(t.JointState(position=['not a number']))
    with pytest.raises(CdrError, match='builtin_interfaces/msg/Time'):
        codec_of(t.Time).encode(t.Time(sec=2**31))
    with pytest.raises(CdrError, match='the array holds 16'):
        codec_of(t.Gid).encode(t.Gid(data=bytes(3)))
    with pytest.raises(CdrError, match='bound is 256'):
        codec_of(t.NodeEntitiesInfo).encode(t.NodeEntitiesInfo(node_name='n' * 257))
    with pytest.raises(CdrError, match='bound is 1'):
        codec_of(t.ParameterDescriptor).encode(t.ParameterDescriptor(
            floating_point_range=[t.FloatingPointRange()] * 2))


def test_nan_and_infinities_pass_unchanged() -> None:
    t = types_for('jazzy')
    msg = t.Float64MultiArray(data=[math.nan, math.inf, -math.inf, -0.0])
    check_against_rosbags(msg, 'jazzy')
    decoded = codec_of(t.Float64MultiArray).decode(codec_of(t.Float64MultiArray).encode(msg))
    assert math.copysign(1.0, decoded.data[3]) == -1.0
