"""`constraint-ctrl replay`: re-run a skill open-loop over the data recorded in a bag.

An integrator tries new gains on yesterday's data before touching the robot: the joint states,
skill inputs and person positions the controller received (a rosbag2 written by `run --record`)
are fed, tick by tick, to the same ControlLoop and Watchdog the node runs, and the replayed
commands, errors and slacks are plotted beside the recorded ones.

Tick alignment. One replayed tick per recorded ``~/command`` message (the node publishes one per
tick, so the skill clock advances exactly as it did, missed timer periods included). The tick's
clock is that message's log time; its joint positions are those of the joint_states sample named
by the header stamp of the ``~/joint_command`` published with it (else the latest before the
command); its inputs and person positions are the latest recorded before the command. Stamps
become capture times exactly as in the node (nodes/inputs.py: capture_time), with the log time
as the receive time. What the bag cannot say is which samples arrived while the node was
computing: the node took its snapshot some fraction of a millisecond to a few milliseconds
before it published, so a sample logged in between is given to the replayed tick although the
node's tick had not seen it yet. With 500 Hz joint states and inputs on a 500 Hz tick that
happens to a good share of ticks on a busy machine; each such tick's command differs by the
skill's response to one sample of sensor noise or motion, and the acceleration limits carry it
into the next few ticks. The tick that activates the skill can be affected the same way, and
then start_value() (the start pose) differs by one sample throughout. The watchdog's clock is
the command's log time, a little after the node's snapshot: near a stale-data timeout the
replay can stop where the node did not, or, having seen a sample the node had not, run on where
the node stopped. Everywhere else the replay computes the recorded command to round-off (see
the README's replay section).

Open loop: the joints do not respond to the replayed commands, so a changed gain shows the
command it would have sent from the recorded states, not how the arm would then have moved. The
replay's own previous command feeds its acceleration limits (skill and watchdog), as on the
robot; it starts from a zero previous command, where the node continued from the previous
skill's last command (``summary.json`` gives that command's size). Tunables changed at run time
(a sequencer's parameter calls) are not in the bag: give them with ``--set``. Node parameters
come from the same parameters file the node read (``--params``) with ``--param`` overrides, so
inputs are mapped and the watchdog is built exactly as in the node.

Times on the command line and in the outputs are seconds since the bag's first message.
"""
from __future__ import annotations

import argparse
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from collections.abc import Iterable, Mapping

import numpy as np

from ..errors import ConstraintCtrlError

#: Seconds of recorded data read before the window, so the first tick has its latest samples.
LOOKBACK = 5.0
#: ~/joint_command follows its ~/command within this (ns); further apart they are not paired.
PAIRING = 50_000_000
#: The node's shutdown zero commands (several, back to back) are this close together (ns).
BURST_GAP = 500_000
SHUTDOWN_ZEROS = 3


class ReplayError(ConstraintCtrlError):
    """A bag, window or option the replay cannot use."""


# ------------------------------------------------------------------------------------- options

def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument('bag', type=Path,
                   help='rosbag2 folder written by `constraint-ctrl run --record`')
    p.add_argument('--skill', type=Path, required=True, help='skill file to replay')
    p.add_argument('--from', dest='start', type=float, metavar='T',
                   help='start at T s after the bag began (default: when the skill was activated)')
    p.add_argument('--to', dest='stop', type=float, metavar='T',
                   help='end at T s after the bag began (default: the next activation or the end)')
    p.add_argument('--activation', type=int, default=1, metavar='N',
                   help='which recorded activation of the skill to replay (1 = the first)')
    p.add_argument('--set', dest='tunables', action='append', default=[], metavar='NAME=VALUE',
                   help="a tunable of the skill, e.g. --set tip_on_line.gain=8 (repeatable)")
    p.add_argument('--params', type=Path,
                   help="the node's parameters file (default: the package's "
                   'config/controller.yaml)')
    p.add_argument('--param', dest='node_params', action='append', default=[],
                   metavar='NAME=VALUE',
                   help='a node parameter over the file, like -p on the node: '
                   'e.g. --param watchdog.reduced_speed=0.015 (repeatable)')
    p.add_argument('--node', default=None,
                   help='recorded node name, e.g. /constraint_controller (default: found in '
                   'the bag)')
    p.add_argument('--robot', type=Path, metavar='FILE',
                   help="the robot's URDF (default: the parameter robot_description_file); "
                   "needed when the node took its model from the robot_description topic")
    p.add_argument('--out', type=Path, default=Path('out/replay'), help='output folder')


def parse_assignments(items: Iterable[str], option: str) -> dict[str, Any]:
    """['a.b=1.5', 'c=true'] -> {'a.b': 1.5, 'c': True} (values read as YAML scalars)."""
    import yaml
    out: dict[str, Any] = {}
    for item in items:
        name, sep, text = item.partition('=')
        if not sep or not name.strip():
            raise ReplayError(f'{option} {item!r}: expected NAME=VALUE')
        try:
            value = yaml.safe_load(text)
        except yaml.YAMLError:
            raise ReplayError(f'{option} {item!r}: the value is not a number, true/false or '
                              'text') from None
        out[name.strip()] = value
    return out


# ----------------------------------------------------------------------------------- the bag

@dataclass
class BagIndex:
    """What the replay needs from a bag before reading its samples."""

    path: Path
    start_ns: int
    node: str                              # '/constraint_controller'
    command_ns: np.ndarray                 # log times of ~/command
    events: list[tuple[int, str]]          # (log time, name) of ~/events

    def seconds(self, t_ns: int | np.ndarray) -> Any:
        return (np.asarray(t_ns) - self.start_ns) * 1e-9


def _open(bag: Path) -> Any:
    from rosbags.highlevel import AnyReader
    from rosbags.typesys import Stores, get_typestore
    if not (bag / 'metadata.yaml').exists():
        raise ReplayError(f'{bag}: not a rosbag2 folder (no metadata.yaml)')
    return AnyReader([bag], default_typestore=get_typestore(Stores.ROS2_JAZZY))


def index_bag(bag: Path, node: str | None = None) -> BagIndex:
    with _open(bag) as reader:
        commands = [c for c in reader.connections if c.topic.endswith('/command')
                    and c.msgtype == 'std_msgs/msg/Float64MultiArray'
                    and (node is None or c.topic == f'{node.rstrip("/")}/command')]
        if len(commands) != 1:
            found = sorted(c.topic for c in reader.connections)
            raise ReplayError(f'{bag}: expected one controller ~/command topic'
                              + (f' of node {node}' if node else '') + f'; topics: {found}'
                              + (' (give --node)' if len(commands) > 1 else ''))
        prefix = commands[0].topic[:-len('/command')]
        events = [c for c in reader.connections if c.topic == f'{prefix}/events']
        times, tail = [], []
        for conn, t, raw in reader.messages(connections=commands):
            times.append(t)
            tail = [*tail[-(SHUTDOWN_ZEROS * 2):], (conn, raw)]
        zeros = [not np.any(reader.deserialize(raw, conn.msgtype).data) for conn, raw in tail]
        names = [(t, reader.deserialize(raw, c.msgtype).data)
                 for c, t, raw in reader.messages(connections=events)]
        start = int(reader.start_time)
    times_ns = np.array(times, dtype=np.int64)
    return BagIndex(bag, start, prefix,
                    times_ns[:len(times_ns) - shutdown_burst(times_ns[-len(zeros):], zeros)],
                    names)


def shutdown_burst(times_ns: np.ndarray, zero: list[bool]) -> int:
    """How many of the last commands are the node's shutdown zeros, not ticks.

    At shutdown the node publishes zero commands back to back (ControllerNode.close): a trailing
    run of all-zero commands each followed by the next within BURST_GAP. A tick is followed by
    the next tick about one period later, so a real zero tick never counts.
    """
    count = 0
    for k in range(len(times_ns) - 1, -1, -1):
        last = k == len(times_ns) - 1
        if not zero[k] or not (last or times_ns[k + 1] - times_ns[k] < BURST_GAP):
            break
        count += 1
    return count if count >= 2 else 0


@dataclass
class Window:
    first: int                  # index of the first replayed ~/command
    last: int                   # index of the last one (inclusive)
    activated_at_s: float | None    # recorded activation of the skill (bag seconds), if any
    note: str = ''


def choose_window(index: BagIndex, skill: str, activation: int, start: float | None,
                  stop: float | None) -> Window:
    """The recorded span of the skill's N-th activation, narrowed by --from/--to."""
    t = index.seconds(index.command_ns)
    if not len(t):
        raise ReplayError(f'{index.path}: no {index.node}/command messages recorded')
    ours = [ts for ts, name in index.events if name == f'activated_{skill}']
    every = sorted(ts for ts, name in index.events if name.startswith('activated_'))
    activated = None
    first, last = 0, len(t) - 1
    note = ''
    if ours:
        if not 1 <= activation <= len(ours):
            raise ReplayError(f'--activation {activation}: {skill} was activated {len(ours)} '
                              'time(s) in this bag')
        at = ours[activation - 1]
        # the node publishes the first command of the new skill, then 'activated_<skill>'
        first = max(0, int(np.searchsorted(index.command_ns, at, side='right')) - 1)
        later = [ts for ts in every if ts > at]
        if later:
            last = int(np.searchsorted(index.command_ns, later[0], side='right')) - 2
        activated = float(index.seconds(index.command_ns[first]))
    elif start is None:
        note = (f'{skill} was never activated in this bag; replaying from the first command '
                '(give --from/--to to choose a window)')
    if start is not None:
        first = max(first, int(np.searchsorted(t, start - 1e-9)))
    if stop is not None:
        last = min(last, int(np.searchsorted(t, stop + 1e-9)) - 1)
    if last < first:
        raise ReplayError(f'the window holds no recorded commands (skill {skill}, '
                          f'from {t[first]:.3f} s to {t[min(last, len(t) - 1)]:.3f} s)')
    if activated is not None and float(t[first]) > activated + 1e-6:
        note = (f'the replay activates {skill} at {t[first]:.3f} s, {t[first] - activated:.3f} s '
                'after the recorded activation: its clock (time) and start_value() differ from '
                'the recording, so commands differ wherever they depend on them')
    return Window(first, last, activated, note)


@dataclass
class Samples:
    """Recorded samples the node's callbacks would have stored, each with its log time (ns)."""

    js_ns: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    js_q: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))       # merged, model order
    js_stamp: np.ndarray = field(default_factory=lambda: np.zeros(0))         # capture time, s
    js_header: dict[int, int] = field(default_factory=dict)                  # header ns -> index
    js_complete: np.ndarray = field(default_factory=lambda: np.zeros(0, bool))
    inputs: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]] = field(default_factory=dict)
    people: dict[str, tuple[np.ndarray, np.ndarray, np.ndarray]] = field(default_factory=dict)
    command_ns: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))
    command: np.ndarray = field(default_factory=lambda: np.zeros((0, 0)))    # command order
    answered_ns: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))


def _capture(header: Any, log_ns: int) -> float:
    from ..nodes.inputs import capture_time
    return capture_time(header.stamp.sec, header.stamp.nanosec, log_ns, log_ns * 1e-9)


class _BagFrames:
    """The node's own frames code (TopicFrames + PointsInBase) fed from the bag's /tf and
    /tf_static in log order, so persons and point inputs in other frames are transformed (or
    fail) as the node did when they arrived."""

    TOPICS = ('/tf', '/tf_static')

    def __init__(self, base_frame: str, timeout_s: float) -> None:
        from types import SimpleNamespace

        from ..nodes.frames import TopicFrames
        from ..nodes.points_in_base import CACHE_TIME, PointsInBase
        self.clock_ns = 0
        self.feed: dict[str, Any] = {}
        port = SimpleNamespace(types=SimpleNamespace(TFMessage=None),
                               now_ns=lambda: self.clock_ns)
        frames = TopicFrames(port, cache_time_s=CACHE_TIME, max_age_s=timeout_s,
                             subscribe=lambda _type, topic, callback, _qos:
                             self.feed.__setitem__(topic, callback))
        self.points = PointsInBase(frames, base_frame, timeout_s, lambda _level, _text: None)

    def preload(self, reader: Any, before_ns: int) -> None:
        """Every /tf and /tf_static message logged before the window's span."""
        conns = [c for c in reader.connections if c.topic in self.TOPICS]
        if not conns:             # (no connections given means all of them to rosbags)
            return
        for conn, _t, raw in reader.messages(connections=conns, stop=before_ns):
            self.feed[conn.topic](reader.deserialize(raw, conn.msgtype))


def read_samples(index: BagIndex, window: Window, joint_names: tuple[str, ...],
                 mappings: Mapping[str, Any], person_sources: Iterable[str],
                 base_frame: str, transform_timeout: float = 0.1) -> Samples:
    """Joint states, mapped inputs, person positions and commands from the window's span."""
    begin = int(index.command_ns[window.first]) - int(LOOKBACK * 1e9)
    end = int(index.command_ns[window.last]) + 1
    joint_index = {j: i for i, j in enumerate(joint_names)}
    q = np.full(len(joint_names), np.nan)
    seen = np.zeros(len(joint_names), bool)
    js_ns, js_q, js_stamp, js_complete, header_of = [], [], [], [], {}
    inputs: dict[str, list[tuple[int, float, float]]] = {m: [] for m in mappings}
    people: dict[str, list[tuple[int, np.ndarray, float]]] = {s: [] for s in person_sources}
    by_topic: dict[str, list[Any]] = {}
    for mapping in mappings.values():
        by_topic.setdefault(mapping.topic, []).append(mapping)
    cmd_ns, cmd, answered = [], [], []
    frames = _BagFrames(base_frame, transform_timeout)
    with _open(index.path) as reader:
        frames.preload(reader, begin)
        wanted = {f'{index.node}/command', f'{index.node}/joint_command', '/joint_states',
                  *by_topic, *people, *_BagFrames.TOPICS}
        conns = [c for c in reader.connections if c.topic in wanted]
        missing = sorted(set(by_topic) - {c.topic for c in conns})
        if missing:
            raise ReplayError(f'{index.path}: the skill reads inputs from {missing}, which the '
                              'bag does not hold (check --params)')
        # ~/joint_command is published just after its ~/command: read a little past the end
        for conn, t, raw in reader.messages(connections=conns, start=begin, stop=end + PAIRING):
            if t >= end and conn.topic != f'{index.node}/joint_command':
                continue
            msg = reader.deserialize(raw, conn.msgtype)
            topic = conn.topic
            frames.clock_ns = t       # the node's ROS time at arrival (an unset stamp: now)
            if topic in frames.feed:
                frames.feed[topic](msg)
            if topic == '/joint_states':
                names, positions = list(msg.name), list(msg.position)
                if len(names) != len(positions):
                    continue          # the node ignores malformed samples too
                for n_, v in zip(names, positions):
                    i = joint_index.get(n_)
                    if i is not None:
                        q[i] = v
                        seen[i] = True
                js_ns.append(t)
                js_q.append(q.copy())
                js_stamp.append(_capture(msg.header, t))
                js_complete.append(bool(seen.all()))
                header_of[msg.header.stamp.sec * 1_000_000_000 + msg.header.stamp.nanosec] = \
                    len(js_ns) - 1
            elif topic == f'{index.node}/command':
                cmd_ns.append(t)
                cmd.append(np.asarray(msg.data, dtype=float))
            elif topic == f'{index.node}/joint_command':
                answered.append((t, msg.header.stamp.sec * 1_000_000_000
                                 + msg.header.stamp.nanosec))
            elif topic in people:      # NaN where the node could not transform it either
                people[topic].append((t, frames.points.person(topic, msg).copy(),
                                      _capture(msg.header, t)))
            if topic in by_topic:
                for mapping in by_topic[topic]:
                    try:
                        value = (frames.points.input_value(mapping, msg) if mapping.frame
                                 else mapping.extract(msg))
                    except (TypeError, ValueError):
                        value = math.nan
                    stamp = _capture(msg.header, t) if mapping.has_header else t * 1e-9
                    inputs[mapping.name].append((t, value, stamp))
    samples = Samples(
        js_ns=np.array(js_ns, dtype=np.int64),
        js_q=np.array(js_q).reshape(len(js_q), len(joint_names)),
        js_stamp=np.array(js_stamp), js_header=header_of,
        js_complete=np.array(js_complete, dtype=bool),
        command_ns=np.array(cmd_ns, dtype=np.int64),
        command=np.array(cmd).reshape(len(cmd), -1) if cmd else np.zeros((0, len(joint_names))),
        answered_ns=_pair(np.array(cmd_ns, dtype=np.int64), answered))
    for name, rows in inputs.items():
        samples.inputs[name] = (np.array([r[0] for r in rows], dtype=np.int64),
                                np.array([r[1] for r in rows]), np.array([r[2] for r in rows]))
    for source, rows in people.items():
        samples.people[source] = (np.array([r[0] for r in rows], dtype=np.int64),
                                  np.array([r[1] for r in rows]).reshape(-1, 3),
                                  np.array([r[2] for r in rows]))
    return samples


def _pair(command_ns: np.ndarray, answered: list[tuple[int, int]]) -> np.ndarray:
    """For each command, the header stamp (ns) of the ~/joint_command published right after it
    (the joint_states sample that tick answered), or -1 when there is none within PAIRING."""
    out = np.full(len(command_ns), -1, dtype=np.int64)
    if not answered:
        return out
    times = np.array([a[0] for a in answered], dtype=np.int64)
    stamps = np.array([a[1] for a in answered], dtype=np.int64)
    after = np.searchsorted(times, command_ns, side='left')
    nxt = np.append(command_ns[1:], np.iinfo(np.int64).max)
    for k, i in enumerate(after):
        if i < len(times) and times[i] < nxt[k] and times[i] - command_ns[k] < PAIRING:
            out[k] = stamps[i]
    return out


@dataclass
class RecordedRows:
    """Per-row values the node published, at the times it published them (bag seconds)."""

    time: np.ndarray
    values: dict[str, dict[str, np.ndarray]]    # row -> 'error' | 'slack' | 'value' -> series
    watchdog_state: list[str] = field(default_factory=list)   # at the same times


def read_recorded_rows(index: BagIndex, skill: str, begin_s: float, end_s: float) -> RecordedRows:
    """Rows of ``skill`` the node published, with the watchdog state of the same moments.

    The one place that knows where recorded row values live: ~/rows (DiagnosticArray, one
    status '<skill>: <row>' per row with keys 'value', 'error', 'slack', ...), with the state
    from ~/status; bags recorded before ~/rows existed carry them in ~/status ('<node>: rows',
    keys '<row>.<what>').
    """
    with _open(index.path) as reader:
        topics = {c.topic for c in reader.connections}
    if f'{index.node}/rows' in topics:
        return _rows_topic(index, skill, begin_s, end_s)
    return _rows_in_status(index, skill, begin_s, end_s)


def _series(times: list[float], raw: list[dict[str, str]], states: list[str]) -> RecordedRows:
    values: dict[str, dict[str, np.ndarray]] = {}
    keys = sorted({k for r in raw for k in r})
    for key in keys:
        row, _, what = key.rpartition('.')
        if what not in ('error', 'slack', 'value'):
            continue
        series = np.array([float(r.get(key, 'nan')) for r in raw])
        values.setdefault(row, {})[what] = series
    return RecordedRows(np.array(times), values, states)


def _rows_topic(index: BagIndex, skill: str, begin_s: float, end_s: float) -> RecordedRows:
    times: list[float] = []
    raw: list[dict[str, str]] = []
    states: list[str] = []
    state = ''
    prefix = f'{skill}: '
    with _open(index.path) as reader:
        conns = [c for c in reader.connections
                 if c.topic in (f'{index.node}/rows', f'{index.node}/status')]
        start = index.start_ns + int(begin_s * 1e9)
        stop = index.start_ns + int(end_s * 1e9) + 1
        for conn, t, data in reader.messages(connections=conns, start=start, stop=stop):
            msg = reader.deserialize(data, conn.msgtype)
            if conn.topic.endswith('/status'):
                for s in msg.status:
                    if s.name.rpartition(': ')[2] == 'watchdog':
                        state = {kv.key: kv.value for kv in s.values}.get('state', '')
                continue
            rows = {s.name[len(prefix):]: {kv.key: kv.value for kv in s.values}
                    for s in msg.status if s.name.startswith(prefix)}
            if not rows:
                continue
            times.append(float(index.seconds(t)))
            raw.append({f'{row}.{key}': value for row, kv in rows.items()
                        for key, value in kv.items()})
            states.append(state)
    return _series(times, raw, states)


def _rows_in_status(index: BagIndex, skill: str, begin_s: float, end_s: float
                    ) -> RecordedRows:
    times: list[float] = []
    raw: list[dict[str, str]] = []
    states: list[str] = []
    with _open(index.path) as reader:
        conns = [c for c in reader.connections if c.topic == f'{index.node}/status']
        start = index.start_ns + int(begin_s * 1e9)
        stop = index.start_ns + int(end_s * 1e9) + 1
        for conn, t, data in reader.messages(connections=conns, start=start, stop=stop):
            msg = reader.deserialize(data, conn.msgtype)
            by_name = {s.name.rpartition(': ')[2]: {kv.key: kv.value for kv in s.values}
                       for s in msg.status}
            if by_name.get('controller', {}).get('skill') != skill:
                continue
            times.append(float(index.seconds(t)))
            raw.append(by_name.get('rows', {}))
            states.append(by_name.get('watchdog', {}).get('state', ''))
    return _series(times, raw, states)


# -------------------------------------------------------------------------------- the replay

@dataclass
class NodeSettings:
    """The node parameters the replay needs, read as the controller node reads them."""

    robot: Path
    joint_names: tuple[str, ...]
    rate_hz: float
    base_frame: str
    person_sources: tuple[str, ...]
    person_timeout: float
    watchdog: dict[str, Any]
    inputs: dict[str, Any]
    transform_timeout: float = 0.1


def node_settings(params_file: Path | None, overrides: Mapping[str, Any], node: str
                  ) -> NodeSettings:
    from ..nodes.common import config_dir
    from ..nodes.inputs import parse_input_mappings
    from ..runtime.watchdog_setup import DEFAULTS
    from ..transport.ros_args import load_params_file, node_key_matches
    cfg = config_dir()
    path = params_file or cfg / 'controller.yaml'
    params: dict[str, Any] = {}
    for key, values in load_params_file(path).items():
        if node_key_matches(key, node):
            params.update(values)
    params.update(overrides)
    if params.get('robot_description_source') == 'topic' and \
            'robot_description_file' not in params:
        raise ReplayError('the node took its robot model from the robot_description topic; '
                          "give the robot's URDF with --robot FILE")
    robot = Path(str(params.get('robot_description_file', cfg / 'robots' / 'six_axis_arm.urdf')))
    from ..model.kinematics import RobotModel
    model_joints = RobotModel.from_urdf(robot).joint_names
    joints = tuple(str(j) for j in params.get('joint_names', model_joints))
    if sorted(joints) != sorted(model_joints):
        raise ReplayError(f'parameter joint_names {list(joints)} must list exactly the movable '
                          f'joints of {robot}: {list(model_joints)}')
    watchdog = {k[len('watchdog.'):]: v for k, v in params.items() if k.startswith('watchdog.')}
    unknown = sorted(set(watchdog) - set(DEFAULTS))
    if unknown:
        raise ReplayError(f'{path}: unknown watchdog parameters {unknown}')
    sources = tuple(str(s) for s in params.get('people.sources', ['']) if s)
    mappings = parse_input_mappings({k[len('inputs.'):]: v for k, v in params.items()
                                     if k.startswith('inputs.')})
    return NodeSettings(robot, joints, float(params.get('rate_hz', 500.0)),
                        str(params.get('base_frame', 'base_link')), sources,
                        float(params.get('people.timeout', 0.2)),
                        {**DEFAULTS, **watchdog}, mappings,
                        float(params.get('people.transform_timeout', 0.1)))


class _OneSkill:
    """The part of SkillLibrary that ControlLoop uses (get by name), holding one skill."""

    def __init__(self, loaded: Any) -> None:
        self._loaded = loaded

    def get(self, name: str) -> Any:
        return self._loaded if name == self._loaded.name else None


@dataclass
class ReplayTrace:
    time: np.ndarray                 # bag seconds of each tick
    command: np.ndarray              # replayed, command order (joint_names)
    recorded: np.ndarray             # recorded, command order
    error: np.ndarray                # rows x ticks of the replayed skill
    slack: np.ndarray
    state: list[str]
    speed_scale: np.ndarray
    status: list[str]
    row_names: tuple[str, ...]
    constraints: dict[str, list[int]]
    events: list[tuple[float, str]]
    js_matched: int                  # ticks whose joint_states sample was found by its stamp
    recorded_before: np.ndarray | None = None   # the recorded command just before the window


def _latest(times: np.ndarray, t: int) -> int:
    return int(np.searchsorted(times, t, side='right')) - 1


def replay(index: BagIndex, window: Window, skill_path: Path, settings: NodeSettings,
           tunables: Mapping[str, Any]) -> ReplayTrace:
    from ..model.kinematics import RobotModel
    from ..runtime.library import SkillLibrary
    from ..runtime.loop import ControlLoop, InputSample, Snapshot
    from ..runtime.watchdog_setup import build_watchdog
    from ..safety.watchdog import PersonSample

    model = RobotModel.from_urdf(settings.robot)
    library = SkillLibrary(skill_path.parent, model.joint_names, model=model)
    loaded = library.load_file(skill_path.resolve())
    compiled = loaded.compiled
    for name, value in tunables.items():
        try:
            i = compiled.param_index(name)
        except KeyError:
            known = ', '.join(p.name for p in compiled.params)
            raise ReplayError(f'--set {name}: {compiled.spec.name} has no tunable {name!r} '
                              f'(tunables: {known})') from None
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ReplayError(f'--set {name}: expected a number, got {value!r}')
        problem = compiled.params[i].check(float(value))
        if problem:
            raise ReplayError(f'--set {problem}')
        loaded.runner.solver.set_param(i, float(value))
    unmapped = [i for i in compiled.input_names if i not in settings.inputs]
    if unmapped:
        raise ReplayError(f'{skill_path}: inputs {unmapped} are not mapped to topics in the '
                          'parameters file (inputs.<input>.topic); give --params')
    mappings = {n: settings.inputs[n] for n in compiled.input_names}
    dt = 1.0 / settings.rate_hz
    watchdog = build_watchdog(model, dt, settings.watchdog,
                              {s: settings.person_timeout for s in settings.person_sources})
    loop = ControlLoop(_OneSkill(loaded), watchdog, dt, person_sources=settings.person_sources)
    samples = read_samples(index, window, model.joint_names, mappings, settings.person_sources,
                           settings.base_frame, settings.transform_timeout)
    to_command = np.array([model.joint_names.index(j) for j in settings.joint_names])
    first_ns = int(index.command_ns[window.first])
    k0 = int(np.searchsorted(samples.command_ns, first_ns))
    ticks = window.last - window.first + 1
    if len(samples.command_ns) < k0 + ticks:
        raise ReplayError(f'{index.path}: the bag has fewer commands than its index says')
    rows = compiled.n_rows
    trace = ReplayTrace(
        time=np.zeros(ticks), command=np.zeros((ticks, model.n_joints)),
        recorded=samples.command[k0:k0 + ticks], error=np.full((ticks, rows), np.nan),
        slack=np.full((ticks, rows), np.nan), state=[], speed_scale=np.zeros(ticks), status=[],
        row_names=tuple(r.name for r in compiled.rows),
        constraints={c.name: [i for i, r in enumerate(compiled.rows) if r.constraint == c.name]
                     for c in compiled.spec.constraints},
        events=[], js_matched=0,
        recorded_before=samples.command[k0 - 1].copy() if k0 > 0 else None)
    loop.request_activation(compiled.spec.name)
    for k in range(ticks):
        t_ns = int(samples.command_ns[k0 + k])
        j = -1
        if samples.answered_ns[k0 + k] >= 0:
            j = samples.js_header.get(int(samples.answered_ns[k0 + k]), -1)
            if j >= 0 and samples.js_ns[j] > t_ns:
                j = -1
            trace.js_matched += j >= 0
        if j < 0:
            j = _latest(samples.js_ns, t_ns)
        complete = j >= 0 and bool(samples.js_complete[j])
        inputs = {}
        for name, (times, values, stamps) in samples.inputs.items():
            i = _latest(times, t_ns)
            if i >= 0:
                inputs[name] = InputSample(float(values[i]), float(stamps[i]))
        people = {}
        for source, (times, points, stamps) in samples.people.items():
            i = _latest(times, t_ns)
            if i >= 0:
                people[source] = PersonSample(source, points[i], float(stamps[i]))
        snap = Snapshot(now=t_ns * 1e-9, q=samples.js_q[j].copy() if complete else None,
                        joint_state_stamp=float(samples.js_stamp[j]) if j >= 0 else None,
                        inputs=inputs, people=people)
        out = loop.step(snap)
        trace.time[k] = float(index.seconds(t_ns))
        trace.command[k] = out.command
        trace.state.append(out.watchdog.state.value)
        trace.speed_scale[k] = out.watchdog.speed_scale
        trace.status.append(out.tick.status.value if out.tick is not None else 'no tick')
        trace.events.extend((trace.time[k], e) for e in out.events)
        if out.tick is not None and loop.active is not None:
            report = loop.active.diagnostics()
            trace.error[k] = report.error
            trace.slack[k] = report.slack
    trace.command = trace.command[:, to_command]
    return trace


def summarise(index: BagIndex, window: Window, trace: ReplayTrace, skill: str,
              joint_names: tuple[str, ...], tunables: Mapping[str, Any],
              params: Mapping[str, Any]) -> dict[str, Any]:
    diff = trace.command - trace.recorded
    per_joint = {}
    for j, name in enumerate(joint_names):
        d = np.abs(diff[:, j])
        per_joint[name] = {'max_abs_difference': float(d.max()),
                           'rms_difference': float(np.sqrt(np.mean(d ** 2))),
                           'max_abs_recorded': float(np.abs(trace.recorded[:, j]).max())}
    worst = np.abs(diff).max(axis=1)
    k = int(worst.argmax())
    moving = np.abs(trace.recorded).max(axis=1) > 0.0
    return {
        'bag': str(index.path), 'node': index.node, 'skill': skill,
        'window': {'from_s': round(float(trace.time[0]), 6),
                   'to_s': round(float(trace.time[-1]), 6),
                   'recorded_activation_s': window.activated_at_s, 'note': window.note},
        'clock': 'seconds since the bag began',
        'tunables_set': dict(tunables), 'node_parameters_set': dict(params),
        'ticks_compared': int(len(trace.time)),
        'recorded_command_before_window_max_abs': None if trace.recorded_before is None
        else float(np.abs(trace.recorded_before).max()),
        'ticks_joint_states_matched_by_stamp': int(trace.js_matched),
        'units': 'rad/s (m/s for prismatic joints)',
        'joints': per_joint,
        'max_abs_difference': float(worst.max()),
        'max_abs_difference_at_s': round(float(trace.time[k]), 6),
        'rms_difference': float(np.sqrt(np.mean(diff ** 2))),
        'ticks_within': {f'{tol:g}': int((worst <= tol).sum()) for tol in (1e-9, 1e-6, 1e-3)},
        'ticks_recorded_moving': int(moving.sum()),
        'ticks_within_while_moving': {f'{tol:g}': int((worst[moving] <= tol).sum())
                                      for tol in (1e-9, 1e-6, 1e-3)},
        'median_abs_difference_while_moving': float(np.median(worst[moving]))
        if moving.any() else None,
        'watchdog_states': {s: trace.state.count(s) for s in sorted(set(trace.state))},
        'solve_status': {s: trace.status.count(s) for s in sorted(set(trace.status))},
        'events': [{'time_s': round(t, 6), 'event': e} for t, e in trace.events],
    }


def run_replay(args: argparse.Namespace) -> int:
    from ..skill.loader import load_skill
    tunables = parse_assignments(args.tunables, '--set')
    node_params = parse_assignments(args.node_params, '--param')
    index = index_bag(args.bag, args.node)
    if getattr(args, 'robot', None) is not None:
        node_params['robot_description_file'] = str(args.robot)
    settings = node_settings(args.params, node_params, index.node)
    spec = load_skill(args.skill)
    window = choose_window(index, spec.name, args.activation, args.start, args.stop)
    trace = replay(index, window, args.skill, settings, tunables)
    rows = read_recorded_rows(index, spec.name, float(trace.time[0]), float(trace.time[-1]))
    summary = summarise(index, window, trace, spec.name, settings.joint_names, tunables,
                        node_params)
    args.out.mkdir(parents=True, exist_ok=True)
    (args.out / 'summary.json').write_text(json.dumps(summary, indent=2) + '\n')
    np.savez_compressed(args.out / 'ticks.npz', time=trace.time, recorded=trace.recorded,
                        replayed=trace.command, watchdog_state=np.array(trace.state),
                        speed_scale=trace.speed_scale, joint_names=np.array(settings.joint_names))
    from .plots import plot_replay
    written = plot_replay(trace, rows, settings.joint_names, spec.name, args.out)
    print(f"replayed {spec.name} over {summary['ticks_compared']} ticks, "
          f"{trace.time[0]:.3f} s to {trace.time[-1]:.3f} s of the bag")
    if window.note:
        print(f'note: {window.note}')
    print(f"  command difference replayed - recorded: max {summary['max_abs_difference']:.3g} "
          f"(at {summary['max_abs_difference_at_s']:.3f} s), RMS {summary['rms_difference']:.3g} "
          'rad/s')
    for name, values in summary['joints'].items():
        print(f"  {name:12s} max {values['max_abs_difference']:.3g}  RMS "
              f"{values['rms_difference']:.3g}")
    print('outputs: ' + ', '.join(str(p) for p in [args.out / 'summary.json',
                                                    args.out / 'ticks.npz', *written]))
    return 0


__all__ = ['BagIndex', 'RecordedRows', 'ReplayTrace', 'Window', 'add_arguments',
           'choose_window', 'index_bag', 'node_settings', 'read_recorded_rows', 'read_samples',
           'replay', 'run_replay', 'summarise']
