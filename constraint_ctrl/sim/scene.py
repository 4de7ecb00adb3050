"""Work-cell scene file: what the simulator builds around the robot.

A scene has a robot and the simulation settings, and any of these fixtures: distance sensors on
the tool with the housing flange they look at (``range_sensors`` + ``flange``), the splined
shaft of the gearbox cell (``shaft``), a screw standing in a threaded hole (``screw``), a curved
panel the tool presses on (``panel``), and an operator.

The YAML is read once, validated completely, and turned into frozen dataclasses so that the
simulation loop never re-checks anything. Every error names the file, the 1-based line and the
dotted field (``shaft.drop``) together with the bad value. Lengths are metres, times seconds,
forces newtons; angles are degrees in the file (keys ending in ``_deg``) and radians in the
dataclasses.
"""
from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import yaml

from ..errors import LocatedError
from ..located_yaml import (MAX_FILE_BYTES, TOO_DEEP, CountingLoader, TooManyNodes,
                            check_expansion)

T = TypeVar('T')


class SceneError(LocatedError):
    """A scene file that cannot be used; carries file, line (1-based) and dotted field."""


# -- plain data -------------------------------------------------------------------------------

@dataclass(frozen=True, slots=True)
class NoiseSpec:
    """Standard deviations of zero-mean Gaussian measurement noise (0 = exact)."""

    joint_position: float = 0.0  # rad
    range: float = 0.0  # m
    force: float = 0.0  # N, per axis
    torque: float = 0.0  # N m, per axis


@dataclass(frozen=True, slots=True)
class RangeSensorSpec:
    """Distance sensors: one beam along +x of each frame (sensor_msgs/Range convention)."""

    frames: tuple[str, ...]
    min_range: float  # m
    max_range: float  # m
    field_of_view: float  # rad; published only, the beam is simulated as a single ray


@dataclass(frozen=True, slots=True)
class Wave:
    """One term A sin(around * angle + across * (r - mid_radius) + phase) of the flange height."""

    amplitude: float  # m
    around: int  # whole waves per turn, so the surface closes on itself
    across: float  # rad/m along the radius
    phase: float  # rad


@dataclass(frozen=True, slots=True)
class FlangeSpec:
    """Annular housing flange; its top surface is a freeform height field over base xy."""

    centre: tuple[float, float]  # m, base frame
    mid_radius: float  # m
    width: float  # m, radial
    height: float  # m, z of the unrippled surface
    waves: tuple[Wave, ...] = ()

    @property
    def inner_radius(self) -> float:
        return self.mid_radius - 0.5 * self.width

    @property
    def outer_radius(self) -> float:
        return self.mid_radius + 0.5 * self.width

    def slope_bound(self) -> float:
        """Upper bound of |grad height| on the annulus (triangle inequality over the waves)."""
        r_in = self.inner_radius
        return sum(abs(w.amplitude) * math.hypot(w.around / r_in, w.across) for w in self.waves)


@dataclass(frozen=True, slots=True)
class ShaftSpec:
    """Vertical splined shaft, the gear that goes onto it and their contact parameters.

    The gear reference point is the tool frame origin (centre of the gear's lower face); the
    gear's reference tooth lies along the tool x axis at the nominal grasp.
    """

    position: tuple[float, float]  # m, axis in the base xy plane
    top: float  # m, z of the shaft end face
    radius: float  # m
    teeth: int
    spline_phase: float  # rad, angle of the shaft spline relative to the gear's nominal grasp
    chamfer_tolerance: float  # rad; the gear slides on when |mismatch| < this
    clearance: float  # m, radial play of the gear bore on the shaft
    drop: float  # m, free travel from the shaft top down to the shoulder
    stiffness: float  # N/m, axial and lateral contact spring
    damping: float  # N s/m
    torsional_stiffness: float  # N m/rad, spline flanks once engaged
    gear_outer_radius: float  # m

    @property
    def pitch(self) -> float:
        """Angular tooth pitch (rad): 2 pi / teeth."""
        return 2.0 * math.pi / self.teeth


@dataclass(frozen=True, slots=True)
class ScrewSpec:
    """A countersunk screw standing in a threaded hole of a horizontal plate (sim/screw_joint.py).

    The hole axis is vertical; the screw advances downwards (into the plate) when turned
    positively about the downward axis (right-hand thread). The tool frame origin is the tip of
    the driver bit.
    """

    hole: tuple[float, float]  # m, xy of the hole axis, base frame
    plate_top: float  # m, z of the plate surface
    standout: float  # m, head top above the plate at the start: the thread still to run
    pitch: float  # m, advance per turn (single-start thread: the lead)
    head_radius: float  # m, the bit lands on the head within this distance of the axis
    capture_radius: float  # m, the bit engages the head's recess within this offset
    tilt_tolerance: float  # rad, and within this tilt of the tool axis from the hole axis
    engage_force: float  # N, and pressed at least this hard
    running_torque: float  # N m, thread-forming and friction torque while running down
    seated_torque_rate: float  # N m/rad, torque rise per radian turned after the head seats
    stiffness: float  # N/m, bit on head and tool on plate, axial contact spring
    damping: float  # N s/m


@dataclass(frozen=True, slots=True)
class PanelSpec:
    """A curved panel: a segment of a cylinder whose axis runs along base y, convex side up.

    The tool frame origin is the centre of the polishing pad; pad and panel together act as one
    spring-damper along the surface normal (sim/panel_contact.py).
    """

    crown: tuple[float, float]  # m, x and z of the panel's highest line
    radius: float  # m, radius of curvature
    y_range: tuple[float, float]  # m, extent along the axis
    half_angle: float  # rad, extent around the axis on either side of the crown
    stiffness: float  # N/m
    damping: float  # N s/m

    @property
    def axis(self) -> tuple[float, float]:
        """x and z of the cylinder axis (below the crown by the radius)."""
        return (self.crown[0], self.crown[1] - self.radius)


@dataclass(frozen=True, slots=True)
class Waypoint:
    """A floor point of the operator path, reached at ``speed`` from the previous waypoint."""

    xy: tuple[float, float]  # m
    speed: float  # m/s; 0 for the first waypoint


@dataclass(frozen=True, slots=True)
class StartAtTime:
    """The operator starts walking at a fixed simulation time."""

    time: float  # s


@dataclass(frozen=True, slots=True)
class StartWhenToolInBox:
    """The operator starts once the tool frame origin has stayed inside a box long enough."""

    lower: tuple[float, float, float]  # m, base frame
    upper: tuple[float, float, float]  # m
    duration: float  # s, continuous time inside


StartTrigger = StartAtTime | StartWhenToolInBox


@dataclass(frozen=True, slots=True)
class OperatorSpec:
    """A person walking a scripted floor path; reported as one point at torso height."""

    name: str
    height: float  # m, z of the reported point
    path: tuple[Waypoint, ...]
    start: StartTrigger


@dataclass(frozen=True, slots=True)
class Scene:
    """A validated scene. ``locations`` maps dotted fields to their line for later errors."""

    file: str
    urdf: Path
    tool_frame: str
    initial_positions: Mapping[str, float]
    rate: float  # Hz, fixed integration rate of the simulator
    command_latency: float  # s
    seed: int
    noise: NoiseSpec
    range_sensors: RangeSensorSpec | None
    flange: FlangeSpec | None
    shaft: ShaftSpec | None
    operator: OperatorSpec | None
    screw: ScrewSpec | None = None
    panel: PanelSpec | None = None
    locations: Mapping[str, int] = field(default_factory=dict)

    def error(self, message: str, field_path: str) -> SceneError:
        """A SceneError pointing at ``field_path`` (or its closest located parent)."""
        probe = field_path
        while probe and probe not in self.locations:
            probe = probe.rpartition('.')[0]
        return SceneError(message, file=self.file, line=self.locations.get(probe),
                          field=field_path)


# -- reading ----------------------------------------------------------------------------------

#: Largest accepted flange slope bound: three beams on a 40 mm circle must see a nearly plane patch.
MAX_FLANGE_SLOPE = 0.3


class _Reader:
    """Walks a composed YAML node tree, constructing leaves and remembering their lines."""

    def __init__(self, file: str, loader: yaml.SafeLoader) -> None:
        self.file = file
        self.loader = loader
        self.locations: dict[str, int] = {}

    def fail(self, message: str, node: yaml.Node | None, path: str) -> SceneError:
        line = node.start_mark.line + 1 if node is not None else self.locations.get(path)
        return SceneError(message, file=self.file, line=line, field=path or None)

    def mapping(self, node: yaml.Node, path: str,
                allowed: tuple[str, ...] | None) -> dict[str, yaml.Node]:
        """Keys to value nodes; ``allowed=None`` accepts any text key (e.g. joint names)."""
        if not isinstance(node, yaml.MappingNode):
            expected = f' with keys {", ".join(allowed)}' if allowed else ''
            raise self.fail(f'expected a mapping{expected}', node, path)
        out: dict[str, yaml.Node] = {}
        for key_node, value_node in node.value:
            key = self.loader.construct_object(key_node, deep=True)
            sub = f'{path}.{key}' if path else str(key)
            if allowed is None and not isinstance(key, str):
                raise self.fail(f'expected a name as key, got {key!r}', key_node, sub)
            if allowed is not None and key not in allowed:
                msg = f'unknown key {key!r}; expected one of: {", ".join(allowed)}'
                raise self.fail(msg, key_node, sub)
            if key in out:
                raise self.fail(f'key {key!r} given twice', key_node, sub)
            out[key] = value_node
            self.locations[sub] = key_node.start_mark.line + 1
        return out

    def sequence(self, node: yaml.Node, path: str) -> list[yaml.Node]:
        if not isinstance(node, yaml.SequenceNode):
            raise self.fail('expected a list', node, path)
        for i, item in enumerate(node.value):
            self.locations[f'{path}[{i}]'] = item.start_mark.line + 1
        return list(node.value)

    def value(self, node: yaml.Node) -> Any:
        return self.loader.construct_object(node, deep=True)

    def number(self, node: yaml.Node, path: str, *, low: float | None = None,
               high: float | None = None, low_open: bool = False) -> float:
        raw = self.value(node)
        num: float | None = None
        if isinstance(raw, (int, float)) and not isinstance(raw, bool):
            num = float(raw)
        elif isinstance(raw, str):  # YAML 1.1 reads 1e-5 (no dot) as text
            try:
                num = float(raw)
            except ValueError:
                num = None
        if num is None or not math.isfinite(num):
            raise self.fail(f'expected a finite number, got {raw!r}', node, path)
        if low is not None and (num < low or (low_open and num == low)):
            rel = '>' if low_open else '>='
            raise self.fail(f'must be {rel} {low:g}, got {num:g}', node, path)
        if high is not None and num > high:
            raise self.fail(f'must be <= {high:g}, got {num:g}', node, path)
        return num

    def integer(self, node: yaml.Node, path: str, *, low: int) -> int:
        raw = self.value(node)
        if not isinstance(raw, int) or isinstance(raw, bool) or raw < low:
            raise self.fail(f'expected a whole number >= {low}, got {raw!r}', node, path)
        return raw

    def text(self, node: yaml.Node, path: str) -> str:
        raw = self.value(node)
        if not isinstance(raw, str) or not raw.strip():
            raise self.fail(f'expected a non-empty text, got {raw!r}', node, path)
        return raw

    def vector(self, node: yaml.Node, path: str, size: int) -> tuple[float, ...]:
        items = self.sequence(node, path)
        if len(items) != size:
            raise self.fail(f'expected {size} numbers, got {len(items)}', node, path)
        return tuple(self.number(item, f'{path}[{i}]') for i, item in enumerate(items))


def _require(reader: _Reader, fields: dict[str, yaml.Node], key: str, parent: yaml.Node,
             path: str) -> yaml.Node:
    if key not in fields:
        raise reader.fail(f'missing required key {key!r}', parent, path)
    return fields[key]


def _optional(fields: dict[str, yaml.Node], key: str, read: Callable[[yaml.Node], T],
              default: T) -> T:
    return read(fields[key]) if key in fields else default


def load_scene(path: str | Path) -> Scene:
    """Read and validate a scene file (config/scenes/gearbox_cell.yaml shows every key of the
    sensors, flange, shaft and operator; config/cookbook/scenes/ the screw and the panel)."""
    path = Path(path)
    name = str(path)
    try:
        with open(path, 'rb') as handle:
            data = handle.read(MAX_FILE_BYTES + 1)   # never more than the limit
    except OSError as exc:
        msg = f'cannot read scene file: {exc.strerror or exc}'
        raise SceneError(msg, file=name) from None
    if len(data) > MAX_FILE_BYTES:
        msg = (f'the file is larger than the limit of {MAX_FILE_BYTES:,} bytes for our YAML '
               'formats')
        raise SceneError(msg, file=name, line=1)
    try:
        text = data.decode('utf-8')
    except UnicodeDecodeError as exc:
        raise SceneError(f'cannot read scene file: {exc}', file=name) from None
    loader: CountingLoader | None = None
    try:
        loader = CountingLoader(text)   # checks the characters already
        root = loader.get_single_node()
        if root is None:
            raise SceneError('the scene file is empty', file=name)
        check_expansion(root, SceneError, name)
        return _read_scene(_Reader(name, loader), root, path.parent)
    except TooManyNodes as exc:
        raise SceneError(exc.problem, file=name, line=exc.problem_mark.line + 1) from None
    except RecursionError:
        raise SceneError(TOO_DEEP, file=name, line=1) from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, 'problem_mark', None)
        line = mark.line + 1 if mark is not None else None
        problem = getattr(exc, 'problem', None) or str(exc)
        raise SceneError(f'not valid YAML: {problem}', file=name, line=line) from None
    finally:
        if loader is not None:
            loader.dispose()


def _read_scene(r: _Reader, root: yaml.Node, folder: Path) -> Scene:
    top = r.mapping(root, '', ('robot', 'simulation', 'noise', 'range_sensors', 'flange',
                               'shaft', 'screw', 'panel', 'operator'))
    for key in ('robot', 'simulation'):
        _require(r, top, key, root, key)
    # the distance sensors see only the flange: one without the other has nothing to do
    for key, other in (('range_sensors', 'flange'), ('flange', 'range_sensors')):
        if key in top and other not in top:
            raise r.fail(f'{key!r} needs {other!r} too (the sensors see only the flange)',
                         None, key)   # the line of the key

    robot = r.mapping(top['robot'], 'robot', ('urdf', 'tool_frame', 'initial_positions'))
    urdf_node = _require(r, robot, 'urdf', top['robot'], 'robot.urdf')
    urdf = (folder / r.text(urdf_node, 'robot.urdf')).resolve()
    if not urdf.is_file():
        raise r.fail(f'URDF file not found: {str(urdf)!r} (paths are relative to the scene '
                     'file)', urdf_node, 'robot.urdf')
    tool_frame = _optional(robot, 'tool_frame', lambda n: r.text(n, 'robot.tool_frame'),
                           'tool_tip')
    initial: dict[str, float] = {}
    if 'initial_positions' in robot:
        joints = r.mapping(robot['initial_positions'], 'robot.initial_positions', None)
        for joint, node in joints.items():
            initial[joint] = r.number(node, f'robot.initial_positions.{joint}')

    sim = r.mapping(top['simulation'], 'simulation', ('rate', 'command_latency', 'seed'))
    rate = r.number(_require(r, sim, 'rate', top['simulation'], 'simulation.rate'),
                    'simulation.rate', low=1.0, high=100000.0)
    latency = _optional(sim, 'command_latency',
                        lambda n: r.number(n, 'simulation.command_latency', low=0.0, high=10.0),
                        0.0)
    seed = _optional(sim, 'seed', lambda n: r.integer(n, 'simulation.seed', low=0), 0)

    noise = NoiseSpec()
    if 'noise' in top:
        nz = r.mapping(top['noise'], 'noise', ('joint_position', 'range', 'force', 'torque'))
        noise = NoiseSpec(**{k: r.number(v, f'noise.{k}', low=0.0) for k, v in nz.items()})

    return Scene(
        file=r.file, urdf=urdf, tool_frame=tool_frame, initial_positions=initial, rate=rate,
        command_latency=latency, seed=seed, noise=noise,
        range_sensors=(_read_range_sensors(r, top['range_sensors'])
                       if 'range_sensors' in top else None),
        flange=_read_flange(r, top['flange']) if 'flange' in top else None,
        shaft=_read_shaft(r, top['shaft']) if 'shaft' in top else None,
        operator=_read_operator(r, top['operator']) if 'operator' in top else None,
        screw=_read_screw(r, top['screw']) if 'screw' in top else None,
        panel=_read_panel(r, top['panel']) if 'panel' in top else None,
        locations=dict(r.locations))


def _read_range_sensors(r: _Reader, node: yaml.Node) -> RangeSensorSpec:
    p = 'range_sensors'
    m = r.mapping(node, p, ('frames', 'min_range', 'max_range', 'field_of_view_deg'))
    frames_node = _require(r, m, 'frames', node, f'{p}.frames')
    frames = tuple(r.text(n, f'{p}.frames[{i}]')
                   for i, n in enumerate(r.sequence(frames_node, f'{p}.frames')))
    if not frames or len(set(frames)) != len(frames):
        raise r.fail(f'expected distinct frame names, got {list(frames)!r}', frames_node,
                     f'{p}.frames')
    low = r.number(_require(r, m, 'min_range', node, f'{p}.min_range'), f'{p}.min_range',
                   low=0.0)
    high_node = _require(r, m, 'max_range', node, f'{p}.max_range')
    high = r.number(high_node, f'{p}.max_range', low=0.0, low_open=True)
    if high <= low:
        raise r.fail(f'max_range {high:g} must be greater than min_range {low:g}', high_node,
                     f'{p}.max_range')
    fov = _optional(m, 'field_of_view_deg',
                    lambda n: r.number(n, f'{p}.field_of_view_deg', low=0.0, high=180.0), 0.0)
    return RangeSensorSpec(frames, low, high, math.radians(fov))


def _read_flange(r: _Reader, node: yaml.Node) -> FlangeSpec:
    p = 'flange'
    m = r.mapping(node, p, ('centre', 'mid_radius', 'width', 'height', 'waves'))
    centre = r.vector(_require(r, m, 'centre', node, f'{p}.centre'), f'{p}.centre', 2)
    mid = r.number(_require(r, m, 'mid_radius', node, f'{p}.mid_radius'), f'{p}.mid_radius',
                   low=0.0, low_open=True)
    width_node = _require(r, m, 'width', node, f'{p}.width')
    width = r.number(width_node, f'{p}.width', low=0.0, low_open=True)
    if width >= 2.0 * mid:
        raise r.fail(f'width {width:g} must be less than twice mid_radius {mid:g}', width_node,
                     f'{p}.width')
    height = r.number(_require(r, m, 'height', node, f'{p}.height'), f'{p}.height')
    waves: list[Wave] = []
    if 'waves' in m:
        for i, item in enumerate(r.sequence(m['waves'], f'{p}.waves')):
            q = f'{p}.waves[{i}]'
            w = r.mapping(item, q, ('amplitude', 'around', 'across', 'phase_deg'))
            waves.append(Wave(
                amplitude=r.number(_require(r, w, 'amplitude', item, f'{q}.amplitude'),
                                   f'{q}.amplitude', low=0.0),
                around=_optional(w, 'around', lambda n, q=q: r.integer(n, f'{q}.around', low=0),
                                 0),
                across=_optional(w, 'across', lambda n, q=q: r.number(n, f'{q}.across'), 0.0),
                phase=math.radians(_optional(w, 'phase_deg',
                                             lambda n, q=q: r.number(n, f'{q}.phase_deg'), 0.0))))
    spec = FlangeSpec((centre[0], centre[1]), mid, width, height, tuple(waves))
    slope = spec.slope_bound()
    if slope > MAX_FLANGE_SLOPE:
        msg = (f'the waves allow slopes up to {slope:.3f} (bound), more than '
               f'{MAX_FLANGE_SLOPE}; lower amplitude, around or across')
        raise r.fail(msg, None, f'{p}.waves')  # the line of the 'waves' key
    return spec


def _read_shaft(r: _Reader, node: yaml.Node) -> ShaftSpec:
    p = 'shaft'
    keys = ('position', 'top', 'radius', 'teeth', 'spline_phase_deg', 'chamfer_tolerance_deg',
            'clearance', 'drop', 'stiffness', 'damping', 'torsional_stiffness',
            'gear_outer_radius')
    m = r.mapping(node, p, keys)

    def need(key: str) -> yaml.Node:
        return _require(r, m, key, node, f'{p}.{key}')

    def positive(key: str) -> float:
        return r.number(need(key), f'{p}.{key}', low=0.0, low_open=True)

    teeth = r.integer(need('teeth'), f'{p}.teeth', low=1)
    half_pitch_deg = 180.0 / teeth
    chamfer = r.number(need('chamfer_tolerance_deg'), f'{p}.chamfer_tolerance_deg', low=0.0,
                       low_open=True, high=half_pitch_deg)
    radius = positive('radius')
    outer_node = need('gear_outer_radius')
    outer = r.number(outer_node, f'{p}.gear_outer_radius', low=0.0, low_open=True)
    clearance = r.number(need('clearance'), f'{p}.clearance', low=0.0)
    if outer <= radius + clearance:
        raise r.fail(f'gear_outer_radius {outer:g} must exceed radius + clearance '
                     f'{radius + clearance:g}', outer_node, f'{p}.gear_outer_radius')
    x, y = r.vector(need('position'), f'{p}.position', 2)
    return ShaftSpec(
        position=(x, y),
        top=r.number(need('top'), f'{p}.top'),
        radius=radius, teeth=teeth,
        spline_phase=math.radians(r.number(need('spline_phase_deg'), f'{p}.spline_phase_deg')),
        chamfer_tolerance=math.radians(chamfer), clearance=clearance,
        drop=positive('drop'), stiffness=positive('stiffness'),
        damping=r.number(need('damping'), f'{p}.damping', low=0.0),
        torsional_stiffness=r.number(need('torsional_stiffness'), f'{p}.torsional_stiffness',
                                     low=0.0),
        gear_outer_radius=outer)


def _read_screw(r: _Reader, node: yaml.Node) -> ScrewSpec:
    p = 'screw'
    keys = ('hole', 'plate_top', 'standout', 'pitch', 'head_radius', 'capture_radius',
            'tilt_tolerance_deg', 'engage_force', 'running_torque', 'seated_torque_rate',
            'stiffness', 'damping')
    m = r.mapping(node, p, keys)

    def need(key: str) -> yaml.Node:
        return _require(r, m, key, node, f'{p}.{key}')

    def positive(key: str) -> float:
        return r.number(need(key), f'{p}.{key}', low=0.0, low_open=True)

    x, y = r.vector(need('hole'), f'{p}.hole', 2)
    head = positive('head_radius')
    capture_node = need('capture_radius')
    capture = r.number(capture_node, f'{p}.capture_radius', low=0.0, low_open=True)
    if capture > head:
        raise r.fail(f'capture_radius {capture:g} must not exceed head_radius {head:g}',
                     capture_node, f'{p}.capture_radius')
    return ScrewSpec(
        hole=(x, y), plate_top=r.number(need('plate_top'), f'{p}.plate_top'),
        standout=positive('standout'), pitch=positive('pitch'), head_radius=head,
        capture_radius=capture,
        tilt_tolerance=math.radians(r.number(need('tilt_tolerance_deg'),
                                             f'{p}.tilt_tolerance_deg', low=0.0,
                                             low_open=True, high=90.0)),
        engage_force=positive('engage_force'),
        running_torque=r.number(need('running_torque'), f'{p}.running_torque', low=0.0),
        seated_torque_rate=positive('seated_torque_rate'),
        stiffness=positive('stiffness'),
        damping=r.number(need('damping'), f'{p}.damping', low=0.0))


def _read_panel(r: _Reader, node: yaml.Node) -> PanelSpec:
    p = 'panel'
    keys = ('crown', 'radius', 'y_range', 'half_angle_deg', 'stiffness', 'damping')
    m = r.mapping(node, p, keys)

    def need(key: str) -> yaml.Node:
        return _require(r, m, key, node, f'{p}.{key}')

    cx, cz = r.vector(need('crown'), f'{p}.crown', 2)
    y_node = need('y_range')
    y0, y1 = r.vector(y_node, f'{p}.y_range', 2)
    if y1 <= y0:
        raise r.fail(f'y_range {[y0, y1]} must run from low to high', y_node, f'{p}.y_range')
    return PanelSpec(
        crown=(cx, cz),
        radius=r.number(need('radius'), f'{p}.radius', low=0.0, low_open=True),
        y_range=(y0, y1),
        half_angle=math.radians(r.number(need('half_angle_deg'), f'{p}.half_angle_deg',
                                         low=0.0, low_open=True, high=90.0)),
        stiffness=r.number(need('stiffness'), f'{p}.stiffness', low=0.0, low_open=True),
        damping=r.number(need('damping'), f'{p}.damping', low=0.0))


def _read_operator(r: _Reader, node: yaml.Node) -> OperatorSpec:
    p = 'operator'
    m = r.mapping(node, p, ('name', 'height', 'path', 'start'))
    name = _optional(m, 'name', lambda n: r.text(n, f'{p}.name'), 'operator')
    height = _optional(m, 'height', lambda n: r.number(n, f'{p}.height', low=0.0), 1.0)
    path_node = _require(r, m, 'path', node, f'{p}.path')
    points: list[Waypoint] = []
    for i, item in enumerate(r.sequence(path_node, f'{p}.path')):
        q = f'{p}.path[{i}]'
        w = r.mapping(item, q, ('to', 'speed'))
        xy = r.vector(_require(r, w, 'to', item, f'{q}.to'), f'{q}.to', 2)
        if i == 0:
            if 'speed' in w:
                raise r.fail('the first waypoint is the starting point and takes no speed',
                             w['speed'], f'{q}.speed')
            speed = 0.0
        else:
            speed = r.number(_require(r, w, 'speed', item, f'{q}.speed'), f'{q}.speed',
                             low=0.0, low_open=True, high=10.0)
        points.append(Waypoint((xy[0], xy[1]), speed))
    if len(points) < 2:
        raise r.fail(f'expected at least 2 waypoints, got {len(points)}', path_node, f'{p}.path')
    start_node = _require(r, m, 'start', node, f'{p}.start')
    start = _read_start(r, start_node, f'{p}.start')
    return OperatorSpec(name, height, tuple(points), start)


def _read_start(r: _Reader, node: yaml.Node, p: str) -> StartTrigger:
    m = r.mapping(node, p, ('at_time', 'tool_in_box'))
    if len(m) != 1:
        raise r.fail('give exactly one of at_time, tool_in_box', node, p)
    if 'at_time' in m:
        return StartAtTime(r.number(m['at_time'], f'{p}.at_time', low=0.0))
    box_node = m['tool_in_box']
    q = f'{p}.tool_in_box'
    b = r.mapping(box_node, q, ('lower', 'upper', 'for'))
    lower = r.vector(_require(r, b, 'lower', box_node, f'{q}.lower'), f'{q}.lower', 3)
    upper_node = _require(r, b, 'upper', box_node, f'{q}.upper')
    upper = r.vector(upper_node, f'{q}.upper', 3)
    if any(hi <= lo for lo, hi in zip(lower, upper)):
        raise r.fail(f'upper {list(upper)} must exceed lower {list(lower)} on every axis',
                     upper_node, f'{q}.upper')
    duration = r.number(_require(r, b, 'for', box_node, f'{q}.for'), f'{q}.for', low=0.0)
    return StartWhenToolInBox((lower[0], lower[1], lower[2]), (upper[0], upper[1], upper[2]),
                              duration)
