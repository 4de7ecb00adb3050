"""~/markers: what the watchdog watches and what the skill's constraints name, for RViz.

One visualization_msgs/MarkerArray per period (parameter markers_rate_hz, 0 = off), in
base_frame, built off the tick (the tick only copies the numbers, ``MarkerJob``). It starts
with a DELETEALL marker, so whatever the last array drew and this one does not (a person who
left, the previous skill's shapes) disappears. Namespaces:

- 'monitored_spheres': one SPHERE per monitored point, its diameter twice the point's radius,
  coloured by the watchdog state (``STATE_COLOURS``);
- 'people': a small SPHERE at each person position the watchdog used;
- 'protective_distance': per person a translucent SPHERE of radius S_p, the protective
  separation distance of its closest monitored sphere at that sphere's published speed
  towards the person (ISO/TS 15066 5.5.4 with the watchdog's terms). The watchdog keeps that
  sphere's surface outside it; it also counts the person nearer by human_speed x data age,
  which is not added to the drawn radius;
- 'constraint_geometry': the points, segments, lines, planes and boxes of the active skill's
  constraints (skill/geometry.py says which are drawn and which cannot be), with the marker
  text naming the constraint.

Markers carry a lifetime of a few periods, so a node that stops leaves nothing behind for long.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..safety.states import State
from ..safety.watchdog import WatchdogGeometry
from ..skill.geometry import LINE_HALF_LENGTH, PLANE_PATCH, Shape

#: RGBA per watchdog state: green, yellow, orange, red.
STATE_COLOURS: dict[State, tuple[float, float, float, float]] = {
    State.NORMAL: (0.1, 0.8, 0.2, 0.6),
    State.REDUCED: (0.95, 0.85, 0.1, 0.6),
    State.STOPPING: (1.0, 0.5, 0.0, 0.6),
    State.STOPPED: (0.9, 0.1, 0.1, 0.6),
}
PERSON_COLOUR = (0.2, 0.4, 1.0, 1.0)
DISTANCE_COLOUR = (0.2, 0.4, 1.0, 0.15)
GEOMETRY_COLOUR = (0.7, 0.2, 0.9, 0.8)
POINT_SIZE = 0.015          # m, diameter of a drawn point
PERSON_SIZE = 0.08          # m, diameter of a person marker
LINE_WIDTH = 0.004          # m
PLANE_THICKNESS = 0.002     # m


@dataclass(frozen=True)
class MarkerJob:
    """What the tick hands over (copies): the watchdog's geometry, and the active skill's
    compiled form with the inputs of its last solve (None when no skill ran)."""

    watchdog: WatchdogGeometry
    skill: Any
    skill_inputs: dict[str, np.ndarray] | None
    stamp_ns: int


def quaternion_z_to(direction: np.ndarray) -> tuple[float, float, float, float]:
    """(x, y, z, w) of the shortest rotation taking the z axis onto ``direction``."""
    n = np.asarray(direction, dtype=float)
    n = n / np.linalg.norm(n)
    if n[2] < -1.0 + 1e-12:                     # opposite: half a turn about x
        return (1.0, 0.0, 0.0, 0.0)
    x, y, z, w = -n[1], n[0], 0.0, 1.0 + n[2]   # (z x n, 1 + z . n), then normalised
    norm = math.sqrt(x * x + y * y + z * z + w * w)
    return (x / norm, y / norm, z / norm, w / norm)


class MarkerBuilder:
    """Builds the MarkerArray from a ``MarkerJob`` (on the marker thread)."""

    def __init__(self, port: Any, frame: str, period_s: float) -> None:
        self.port = port
        self.t = port.types
        self.frame = frame
        lifetime = max(1.0, 3.0 * period_s)
        self._lifetime = (int(lifetime), int(round((lifetime % 1.0) * 1e9)))

    def _marker(self, header: Any, ns: str, ident: int, kind: int, *,
                position: np.ndarray | tuple[float, float, float] = (0.0, 0.0, 0.0),
                orientation: tuple[float, float, float, float] = (0.0, 0.0, 0.0, 1.0),
                scale: tuple[float, float, float] = (1.0, 1.0, 1.0),
                colour: tuple[float, float, float, float] = (1.0, 1.0, 1.0, 1.0),
                points: list[np.ndarray] | None = None, text: str = '') -> Any:
        t = self.t
        x, y, z = (float(v) for v in position)
        qx, qy, qz, qw = orientation
        r, g, b, a = colour
        sec, nanosec = self._lifetime
        return t.Marker(
            header=header, ns=ns, id=ident, type=kind, action=t.Marker.ADD,
            pose=t.Pose(position=t.Point(x=x, y=y, z=z),
                        orientation=t.Quaternion(x=qx, y=qy, z=qz, w=qw)),
            scale=t.Vector3(x=float(scale[0]), y=float(scale[1]), z=float(scale[2])),
            color=t.ColorRGBA(r=r, g=g, b=b, a=a),
            lifetime=t.Duration(sec=sec, nanosec=nanosec), frame_locked=False,
            points=[t.Point(x=float(p[0]), y=float(p[1]), z=float(p[2])) for p in points or []],
            text=text)

    def build(self, job: MarkerJob, shapes: list[Shape]) -> Any:
        t = self.t
        sec, nanosec = divmod(job.stamp_ns, 1_000_000_000)
        header = t.Header(stamp=t.Time(sec=int(sec), nanosec=int(nanosec)), frame_id=self.frame)
        M = t.Marker
        markers = [t.Marker(header=header, ns='', id=0, action=M.DELETEALL)]
        wd = job.watchdog
        colour = STATE_COLOURS[wd.state]
        if wd.points is not None:
            for i, (centre, radius) in enumerate(zip(wd.points, wd.radii)):
                d = 2.0 * float(radius)
                markers.append(self._marker(header, 'monitored_spheres', i, M.SPHERE,
                                            position=centre, scale=(d, d, d), colour=colour,
                                            text=wd.state.value))
        for j, person in enumerate(wd.people):
            markers.append(self._marker(header, 'people', j, M.SPHERE, position=person,
                                        scale=(PERSON_SIZE,) * 3, colour=PERSON_COLOUR))
            d = 2.0 * float(wd.protective_distances[j])
            markers.append(self._marker(header, 'protective_distance', j, M.SPHERE,
                                        position=person, scale=(d, d, d),
                                        colour=DISTANCE_COLOUR))
        for k, shape in enumerate(shapes):
            markers.append(self._shape(header, k, shape))
        return t.MarkerArray(markers=markers)

    def _shape(self, header: Any, ident: int, shape: Shape) -> Any:
        M = self.t.Marker
        ns, name, data = 'constraint_geometry', shape.constraint, shape.data
        if shape.kind == 'point':
            return self._marker(header, ns, ident, M.SPHERE, position=data,
                                scale=(POINT_SIZE,) * 3, colour=GEOMETRY_COLOUR, text=name)
        if shape.kind == 'segment':
            return self._marker(header, ns, ident, M.LINE_LIST, scale=(LINE_WIDTH, 0.0, 0.0),
                                colour=GEOMETRY_COLOUR, points=[data[0], data[1]], text=name)
        if shape.kind == 'line':
            assert shape.centre is not None
            u = data[3:]
            return self._marker(header, ns, ident, M.LINE_LIST, scale=(LINE_WIDTH, 0.0, 0.0),
                                colour=GEOMETRY_COLOUR, text=name,
                                points=[shape.centre - LINE_HALF_LENGTH * u,
                                        shape.centre + LINE_HALF_LENGTH * u])
        if shape.kind == 'plane':
            assert shape.centre is not None
            return self._marker(header, ns, ident, M.CUBE, position=shape.centre,
                                orientation=quaternion_z_to(data[:3]),
                                scale=(PLANE_PATCH, PLANE_PATCH, PLANE_THICKNESS),
                                colour=GEOMETRY_COLOUR[:3] + (0.3,), text=name)
        # box between two corners
        lower, upper = np.minimum(data[0], data[1]), np.maximum(data[0], data[1])
        size = np.maximum(upper - lower, PLANE_THICKNESS)
        return self._marker(header, ns, ident, M.CUBE, position=(lower + upper) / 2.0,
                            scale=tuple(size), colour=GEOMETRY_COLOUR[:3] + (0.15,), text=name)


class SkillShapes:
    """The compiled geometry of each skill, built on first use (on the marker thread) and
    kept while the compiled skill is the same object (a reload compiles a new one)."""

    def __init__(self) -> None:
        self._cache: dict[int, tuple[Any, Any]] = {}

    def shapes(self, compiled: Any, inputs: dict[str, np.ndarray] | None) -> list[Shape]:
        if compiled is None or inputs is None:
            return []
        from ..skill.geometry import SkillGeometry
        entry = self._cache.get(id(compiled))
        if entry is None or entry[0] is not compiled:
            if len(self._cache) > 32:
                self._cache.clear()
            entry = (compiled, SkillGeometry.of(compiled))
            self._cache[id(compiled)] = entry
        return entry[1].evaluate(inputs)


__all__ = ['MarkerBuilder', 'MarkerJob', 'STATE_COLOURS', 'SkillShapes', 'quaternion_z_to']
