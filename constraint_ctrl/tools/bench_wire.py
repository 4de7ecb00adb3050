"""`bench` section `wire`: cost of (de)serialising the control loop's messages.

For each hot message, the DDS port's codec (transport/cdr.py, what the port uses since the
wire layer was reworked) is timed interleaved with cyclonedds-python's generic serialiser of
the same struct (what the port used before), on the same message, in one run. "in" is
decoding a received sample, "out" encoding one to publish. JointState is measured twice on
the way in: names as a stream repeats them (the codec keeps the last list of names) and names
that change with every sample. Medians and percentiles of one run; nothing here asserts a time.
"""
from __future__ import annotations

from collections.abc import Callable
from typing import Any

from ..transport.dds_types import codec_of, types_for
from .bench import Stats, _interleaved

JOINTS = [f'joint_{i}' for i in range(1, 7)]


def _messages(t: Any) -> dict[str, tuple[str, Any]]:
    header = t.Header(stamp=t.Time(sec=1_700_000_000, nanosec=123_456_789),
                      frame_id='base_link')
    values = [0.1, -0.25, 0.5, 1.0, -1.5, 0.75]
    range_extra = {'variance': 0.0} if hasattr(t.Range(), 'variance') else {}
    return {
        'JointState in': ('in', t.JointState(header=header, name=JOINTS, position=values,
                                             velocity=values, effort=[])),
        'Float64MultiArray out': ('out', t.Float64MultiArray(
            layout=t.MultiArrayLayout(dim=[t.MultiArrayDimension(label='joint_velocity',
                                                                 size=6, stride=6)]),
            data=values)),
        'JointState out': ('out', t.JointState(header=header, name=JOINTS, position=[],
                                               velocity=values, effort=[])),
        'Range in': ('in', t.Range(header=t.Header(stamp=header.stamp, frame_id='range_left'),
                                   radiation_type=1, field_of_view=0.05, min_range=0.01,
                                   max_range=0.5, range=0.12, **range_extra)),
        'WrenchStamped in': ('in', t.WrenchStamped(header=t.Header(stamp=header.stamp,
                                                                   frame_id='tool'),
                                                   wrench=t.Wrench(
                                                       force=t.Vector3(x=0.1, y=0.2, z=-5.0),
                                                       torque=t.Vector3(z=0.01)))),
        'PointStamped in': ('in', t.PointStamped(header=header,
                                                 point=t.Point(x=0.8, y=-0.2, z=1.1))),
    }


def bench_wire(samples: int = 20000, distro: str = 'jazzy') -> dict[str, object]:
    """µs per message for each hot type: ours vs cyclonedds-python, interleaved."""
    t = types_for(distro)
    report: dict[str, object] = {
        'note': 'us per message; "ours" = transport/cdr.py codec used by the DDS port, '
                '"cyclonedds" = cyclonedds-python IdlStruct serialize/deserialize (used '
                'before); interleaved, one run',
        'distro': distro,
    }
    for label, (direction, msg) in _messages(t).items():
        ours, theirs = _calls(direction, msg)
        report[label] = _pair(ours, theirs, samples)
    # names changing with every sample: the codec cannot reuse its last list
    js = _messages(t)['JointState in'][1]
    codec = codec_of(type(js))
    variants = []
    for k in range(2):
        js.name = [f'{name}_{k}' for name in JOINTS]
        variants.append(codec.encode(js))
    flip = [0]

    def ours_changing() -> object:
        flip[0] ^= 1
        return codec.decode(variants[flip[0]])

    def theirs_changing() -> object:
        return type(js).deserialize(variants[flip[0]])
    report['JointState in, names changing'] = _pair(ours_changing, theirs_changing, samples)
    return report


def _calls(direction: str, msg: Any) -> tuple[Callable[[], object], Callable[[], object]]:
    codec = codec_of(type(msg))
    if direction == 'in':
        data = codec.encode(msg)
        cls = type(msg)
        return (lambda: codec.decode(data)), (lambda: cls.deserialize(data))
    return (lambda: codec.encode(msg)), (lambda: msg.serialize())


def _pair(ours: Callable[[], object], theirs: Callable[[], object],
          samples: int) -> dict[str, object]:
    for _ in range(200):             # warm caches and the codec's kept names
        ours()
        theirs()
    a, b = _interleaved([ours, theirs], samples)
    mine, generic = Stats.of(a), Stats.of(b)
    return {'ours': mine.as_dict(), 'cyclonedds': generic.as_dict(),
            'ratio_median': round(generic.median_us / mine.median_us, 1)}


__all__ = ['bench_wire']
