"""The controller node: joint states and sensors in, one QP per tick, velocity commands out.

The node only moves data between the port (rclpy or direct DDS) and the middleware-free
ControlLoop. Interface (names relative to the node, default node name constraint_controller):

- subscribes joint_states (sensor_msgs/JointState, matched by name), every topic a skill input
  is mapped to (parameters inputs.<input>.topic/type/field/scale) and the person-position
  topics in people.sources (geometry_msgs/PointStamped in base_frame);
- publishes ~/command (std_msgs/Float64MultiArray, joint velocities in the order of
  joint_names), ~/joint_command (sensor_msgs/JointState: the same velocities with names, stamped
  with the joint_states sample they answer), ~/events (std_msgs/String), ~/status
  (diagnostic_msgs/DiagnosticArray at status_rate_hz);
- serves ~/skills/<skill>/activate and ~/reload_skills (std_srvs/Trigger) and the standard
  parameter services; each skill's tunables are parameters <skill>.<tunable>.

Threads: the control tick runs on the port's timer thread (or on the joint_states callback with
tick_on = joint_states); callbacks only store the latest samples under a lock. Any exception in
a tick publishes a zero command; so does shutdown.
"""
from __future__ import annotations

import argparse
import json
import threading
import time
import traceback
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import ConstraintCtrlError, TransportError
from ..model.kinematics import RobotModel
from ..runtime.library import SkillLibrary
from ..runtime.loop import ControlLoop, InputSample, LoopOutput, Snapshot
from ..runtime.watchdog_setup import DEFAULTS as WATCHDOG_DEFAULTS
from ..runtime.watchdog_setup import build_watchdog
from ..safety.watchdog import PersonSample
from .common import config_dir, serve, split_ros_args, transport_options
from .inputs import TYPE_ATTRIBUTE, InputMapping, capture_time, check_field, \
    parse_input_mappings
from .status import build_status

NODE_NAME = 'constraint_controller'
#: Parameters fixed at start-up (changing them needs a restart).
STARTUP_PARAMETERS = ('robot_description_file', 'skills_folder', 'joint_names', 'rate_hz',
                      'status_rate_hz', 'initial_skill', 'tick_on', 'base_frame',
                      'people.sources', 'people.timeout')


class ControllerNode:
    def __init__(self, port: Any, record: Path | None = None) -> None:
        self.port = port
        self._lock = threading.Lock()
        self._tick_lock = threading.Lock()
        cfg = config_dir()
        declare = port.declare_parameter
        robot = str(declare('robot_description_file', str(cfg / 'robots' / 'six_axis_arm.urdf'),
                            'URDF file of the robot', read_only=True).value)
        self.model = RobotModel.from_urdf(robot)
        names = list(declare('joint_names', list(self.model.joint_names),
                             'joint order of ~/command', read_only=True).value)
        if sorted(names) != sorted(self.model.joint_names):
            msg = (f'parameter joint_names {names} must list exactly the movable joints of '
                   f'{robot}: {list(self.model.joint_names)}')
            raise ConstraintCtrlError(msg)
        self.joint_names = names
        self._to_command = np.array([self.model.joint_names.index(j) for j in names])
        self._joint_index = {j: i for i, j in enumerate(self.model.joint_names)}
        self.rate = float(declare('rate_hz', 500.0, 'control rate (Hz)', read_only=True).value)
        self.dt = 1.0 / self.rate
        status_rate = float(declare('status_rate_hz', 10.0, '~/status rate (Hz)',
                                    read_only=True).value)
        self._status_every = max(1, round(self.rate / status_rate))
        self.tick_on = str(declare('tick_on', 'timer', 'timer, or joint_states (tick on each '
                                   'sample, timer as fallback)', read_only=True).value)
        if self.tick_on not in ('timer', 'joint_states'):
            msg = f"parameter tick_on must be 'timer' or 'joint_states', got {self.tick_on!r}"
            raise ConstraintCtrlError(msg)
        self.base_frame = str(declare('base_frame', 'base_link', 'frame of person positions',
                                      read_only=True).value)
        sources = [str(s) for s in declare('people.sources', [''],
                                           'PointStamped topics of person positions',
                                           read_only=True).value if s]
        person_timeout = float(declare('people.timeout', 0.2, 's', read_only=True).value)
        settings = {}
        for key, default in WATCHDOG_DEFAULTS.items():
            settings[key] = declare(f'watchdog.{key}', default, f'watchdog {key}',
                                    read_only=key != 'reduced_mode').value
        self.watchdog = build_watchdog(self.model, self.dt, settings,
                                       {s: person_timeout for s in sources})
        folder = Path(str(declare('skills_folder', str(cfg / 'skills'),
                                  'folder of skill files', read_only=True).value))
        self.library = SkillLibrary(folder, self.model.joint_names)
        report = self.library.reload()
        for line in report.log_lines():   # one failed file per line
            port.log('info' if report.ok else 'warn', f'skills: {line}')
        self.loop = ControlLoop(self.library, self.watchdog, self.dt, person_sources=sources)
        self._initial = str(declare('initial_skill', '', 'skill to activate at start',
                                    read_only=True).value)
        declare('activate_skill', '', 'write-only: setting it activates that skill at the next '
                'tick, together with the tunables set in the same (atomic) call')
        self.mappings = parse_input_mappings(
            {k: v.value for k, v in port.get_parameters_by_prefix('inputs').items()})

        # latest samples (guarded by self._lock)
        n = self.model.n_joints
        self._q = np.full(n, np.nan)
        self._seen = np.zeros(n, dtype=bool)
        self._js_stamp: float | None = None
        self._js_header = (0, 0)
        self._inputs: dict[str, InputSample] = {}
        self._people: dict[str, PersonSample] = {}
        self._last_tick = 0.0
        self._closing = False
        # arrival of a joint_states sample -> its command published (tick_on joint_states)
        self._arrived_ns = 0
        self._latency_ns = np.zeros(1 << 20, dtype=np.int64)
        self._latency_count = 0
        self._ticks = 0
        self._errors = 0

        t = port.types
        self.recorder: Any = None      # opened at the end of __init__ (see _open_recorder)
        self._record_to = record
        self._bag_topics: dict[str, tuple[str, str]] = {}  # name used -> (type, qos profile)
        self._bag_names: dict[str, str] = {}               # publisher's topic -> name used
        self._record_errors = 0
        self._pub_command = self._publisher(t.Float64MultiArray, '~/command', 'default')
        self._pub_joint_command = self._publisher(t.JointState, '~/joint_command', 'default')
        self._pub_events = self._publisher(t.String, '~/events', 'default')
        self._pub_status = self._publisher(t.DiagnosticArray, '~/status', 'default')
        self._subscribe(t.JointState, 'joint_states', self._on_joint_states)
        for mapping in self.mappings.values():
            msg_type = getattr(t, TYPE_ATTRIBUTE[mapping.ros_type])
            check_field(mapping, msg_type())
            self._subscribe(msg_type, mapping.topic, self._input_callback(mapping))
        for source in sources:
            self._subscribe(t.PointStamped, source, self._person_callback(source))
        self._services: dict[str, object] = {}
        port.create_service(t.Trigger, '~/reload_skills', self._on_reload)
        for name in self.library.names():
            self._add_skill(name)
        port.set_parameter_validator(self._validate_parameters)
        port.add_parameter_listener(self._apply_parameters)
        self.timer = port.create_timer(self.dt, self._on_timer)
        self._open_recorder()
        port.log('info', f'{NODE_NAME} ready: {len(self.library.names())} skills, '
                 f'{self.rate:g} Hz, tick on {self.tick_on}, transport '
                 f'{type(port).__name__}')

    # ------------------------------------------------------------ plumbing
    # The bag names each topic as the port really used it: the fully qualified name after
    # remapping, from the publisher's or subscription's topic_name (rclpy's property, which the
    # DDS port mirrors). Two entities on one topic record it once.
    def _publisher(self, msg_type: Any, topic: str, qos: str) -> Any:
        pub = self.port.create_publisher(msg_type, topic, qos)
        name = str(pub.topic_name)
        self._bag_names[topic] = name
        self._bag_topics.setdefault(name, (self.port.type_name(msg_type), qos))
        return pub

    def _subscribe(self, msg_type: Any, topic: str, callback: Any) -> None:
        if self._record_to is None:
            self.port.create_subscription(msg_type, topic, callback, 'sensor')
            return
        records_to: list[str] = []      # the bag topic, unless another subscription has it

        def recorded(msg: Any) -> None:
            if records_to:
                self._record(records_to[0], msg)
            callback(msg)
        sub = self.port.create_subscription(msg_type, topic, recorded, 'sensor')
        name = str(sub.topic_name)
        if name not in self._bag_topics:
            self._bag_topics[name] = (self.port.type_name(msg_type), 'sensor')
            records_to.append(name)

    def _open_recorder(self) -> None:
        """Last step of start-up, so a node that fails to start leaves no bag folder behind."""
        if self._record_to is None:
            return
        from ..transport.bag import BagRecorder
        recorder = BagRecorder(self._record_to, distro=self.port.distro,
                               on_failure=lambda text: self.port.log('error', text))
        for name, (ros_type, qos) in self._bag_topics.items():
            recorder.add_topic(name, ros_type, qos)
        self.recorder = recorder
        self.port.log('info', f'recording {len(self._bag_topics)} topics to {self._record_to} '
                      f'(rosbag2 for ROS 2 {self.port.distro})')

    def _record(self, name: str, msg: Any) -> None:
        """Never lets recording disturb control: a failure here is counted and logged once."""
        recorder = self.recorder
        if recorder is None:
            return
        try:
            recorder.write(name, self.port.now_ns(), self.port.serialize(msg))
        except Exception as exc:  # noqa: BLE001 - the tick and the callbacks must go on
            self._record_errors += 1
            if self._record_errors == 1:
                self.port.log('error', f'recording {name} failed: {exc!r}; such messages are '
                              'left out of the bag (counted in ~/status recorder_dropped)')

    def _publish(self, pub: Any, topic: str, msg: Any) -> None:
        pub.publish(msg)
        if self.recorder is not None:
            self._record(self._bag_names[topic], msg)

    # ------------------------------------------------------------ callbacks
    def _stamp(self, header: Any) -> float:
        return capture_time(header.stamp.sec, header.stamp.nanosec, self.port.now_ns(),
                            time.monotonic())

    def _on_joint_states(self, msg: Any) -> None:
        arrived = time.perf_counter_ns()
        names = list(msg.name)
        positions = list(msg.position)
        if len(positions) != len(names):
            return  # malformed: never move on it (the stale timeout will stop the arm)
        stamp = self._stamp(msg.header)
        with self._lock:
            for name, value in zip(names, positions):
                i = self._joint_index.get(name)
                if i is not None:
                    self._q[i] = value
                    self._seen[i] = True
            self._js_stamp = stamp
            self._js_header = (msg.header.stamp.sec, msg.header.stamp.nanosec)
        if self.tick_on == 'joint_states':
            self._arrived_ns = arrived
            self._tick()

    def _input_callback(self, mapping: InputMapping) -> Any:
        def callback(msg: Any) -> None:
            try:
                value = mapping.extract(msg)
            except (TypeError, ValueError):
                value = float('nan')
            stamp = self._stamp(msg.header) if mapping.has_header else time.monotonic()
            with self._lock:
                self._inputs[mapping.name] = InputSample(value, stamp)
        return callback

    def _person_callback(self, source: str) -> Any:
        def callback(msg: Any) -> None:
            frame = msg.header.frame_id
            if frame not in ('', self.base_frame):
                self.port.log('warn', f'{source}: person position in frame {frame!r}, expected '
                              f'{self.base_frame!r}; ignored (no transform lookup here)')
                return
            point = np.array([msg.point.x, msg.point.y, msg.point.z], dtype=float)
            with self._lock:
                self._people[source] = PersonSample(source, point, self._stamp(msg.header))
        return callback

    # ----------------------------------------------------------------- tick
    def _on_timer(self) -> None:
        if self.tick_on == 'joint_states' and \
                time.monotonic() - self._last_tick < 1.5 * self.dt:
            return
        self._tick()

    def _snapshot(self) -> Snapshot:
        with self._lock:
            seen = self._seen.all()
            q = self._q.copy() if seen else None
            missing = [] if seen else [j for j, s in zip(self.model.joint_names, self._seen)
                                       if not s]
            return Snapshot(now=time.monotonic(), q=q, joint_state_stamp=self._js_stamp,
                            inputs=dict(self._inputs), people=dict(self._people),
                            missing_joints=missing if self._js_stamp is not None else [])

    def _tick(self) -> None:
        if self._closing or not self._tick_lock.acquire(blocking=False):
            return
        try:
            snap = self._snapshot()
            self._last_tick = snap.now
            if self._initial and snap.q is not None:
                self.loop.request_activation(self._initial)
                self._initial = ''
            out = self.loop.step(snap)
            self._send(out)
            if self._arrived_ns:
                self._latency_ns[self._latency_count % self._latency_ns.size] = \
                    time.perf_counter_ns() - self._arrived_ns
                self._latency_count += 1
                self._arrived_ns = 0
            self._ticks += 1
            if self._ticks % self._status_every == 0:
                self._send_status(out)
        except Exception:  # noqa: BLE001 - any failure in a tick must end in a zero command
            self._errors += 1
            try:
                self._send_zero()
            finally:
                self.port.log('error', 'tick failed, zero command sent:\n'
                              + traceback.format_exc())
        finally:
            self._tick_lock.release()

    def _command_messages(self, command_model: np.ndarray) -> tuple[Any, Any]:
        t = self.port.types
        data = command_model[self._to_command].tolist()
        n = len(data)
        array = t.Float64MultiArray(
            layout=t.MultiArrayLayout(dim=[t.MultiArrayDimension(label='joint_velocity',
                                                                 size=n, stride=n)],
                                      data_offset=0),
            data=data)
        sec, nanosec = self._js_header
        joint = t.JointState(header=t.Header(stamp=t.Time(sec=int(sec), nanosec=int(nanosec)),
                                             frame_id=''),
                             name=list(self.joint_names), position=[], velocity=data, effort=[])
        return array, joint

    def _send(self, out: LoopOutput) -> None:
        array, joint = self._command_messages(out.command)
        self._publish(self._pub_command, '~/command', array)
        self._publish(self._pub_joint_command, '~/joint_command', joint)
        for name in out.events:
            self._publish(self._pub_events, '~/events', self.port.types.String(data=name))
        if out.activated:
            self._publish(self._pub_events, '~/events',
                          self.port.types.String(data=f'activated_{out.activated}'))
        for tr in out.watchdog.transitions:
            values = ', '.join(f'{k}={v:.4g}' for k, v in tr.values.items())
            text = (f'watchdog {tr.from_state.value} -> {tr.to_state.value}: {tr.reason}'
                    + (f' ({values})' if values else ''))
            self.port.log('info' if tr.to_state.value == 'normal' else 'warn', text)

    def _send_zero(self) -> None:
        array, joint = self._command_messages(np.zeros(self.model.n_joints))
        self._publish(self._pub_command, '~/command', array)
        self._publish(self._pub_joint_command, '~/joint_command', joint)

    def _send_status(self, out: LoopOutput) -> None:
        runner = self.loop.active
        rows = runner.diagnostics() if runner is not None and out.tick is not None else None
        names = [r.name for r in runner.skill.rows] if runner is not None else []
        recorder = self.recorder
        faults = self.port.faults().values()
        extra = {'missed_ticks': str(getattr(self.timer, 'missed', 0)),
                 'tick_errors': str(self._errors),
                 'recorder': recorder.state if recorder is not None else 'off',
                 'recorder_written': str(recorder.written if recorder is not None else 0),
                 'recorder_dropped': str((recorder.dropped if recorder is not None else 0)
                                         + self._record_errors),
                 'recorder_error': recorder.error if recorder is not None else '',
                 'samples_dropped': str(sum(f.dropped for f in faults)),
                 'callback_errors': str(sum(f.callback_errors for f in faults))}
        msg = build_status(self.port, self.port.node_name, out, rows, names, self.port.now_ns(),
                           extra)
        self._publish(self._pub_status, '~/status', msg)

    # ------------------------------------------------------------- skills
    def _add_skill(self, name: str) -> None:
        loaded = self.library.get(name)
        assert loaded is not None
        for info in loaded.compiled.params:
            param = f'{name}.{info.name}'
            value = float(self.port.declare_parameter(
                param, float(info.value), f'{info.description} [{info.unit}]'.strip()).value)
            problem = info.check(value)
            if problem:
                self.port.log('warn', f'parameter {param}: {problem}; keeping {info.value}')
            elif value != info.value:
                self.loop.set_parameters(name, {loaded.compiled.param_index(info.name): value})
        self._services[name] = self.port.create_service(
            self.port.types.Trigger, f'~/skills/{name}/activate', self._activate_callback(name))

    def _activate_callback(self, name: str) -> Any:
        def callback(request: Any, response: Any) -> Any:
            problem = self._cannot_activate(name)
            if problem:
                response.success, response.message = False, problem
                return response
            ok, message = self.loop.request_activation(name, timeout=max(1.0, 20 * self.dt))
            response.success, response.message = ok, message
            return response
        return callback

    def _cannot_activate(self, name: str) -> str | None:
        loaded = self.library.get(name)
        if loaded is None:
            return f'skill {name!r} is not loaded (loaded: {", ".join(self.library.names())})'
        unmapped = [i for i in loaded.compiled.input_names if i not in self.mappings]
        if unmapped:
            return (f'skill {name!r} reads inputs {unmapped} that no topic is mapped to '
                    '(parameters inputs.<input>.topic)')
        return None

    def _on_reload(self, request: Any, response: Any) -> Any:
        before = set(self._services)
        report = self.library.reload()
        for name in report.added:
            if name not in before:
                self._add_skill(name)
        for name in report.changed:
            self._reapply_parameters(name)
        for name in report.removed:
            handle = self._services.pop(name, None)
            if handle is not None:
                self.port.destroy_service(handle)
        response.success = report.ok
        response.message = report.summary()
        for line in report.log_lines():   # one failed file per line
            self.port.log('info' if report.ok else 'warn', f'reload: {line}')
        return response

    def _reapply_parameters(self, name: str) -> None:
        """A changed file keeps the values set on the node (declared parameters win)."""
        loaded = self.library.get(name)
        assert loaded is not None
        values = {}
        for info in loaded.compiled.params:
            try:
                value = float(self.port.get_parameter(f'{name}.{info.name}').value)
            except Exception:  # noqa: BLE001 - a new tunable: declare it
                self.port.declare_parameter(f'{name}.{info.name}', float(info.value),
                                            info.description)
                continue
            if info.check(value) is None:
                values[loaded.compiled.param_index(info.name)] = value
        loaded.runner.solver.p[list(values)] = list(values.values())

    # ---------------------------------------------------------- parameters
    def _tunable(self, name: str) -> tuple[str, Any, str] | None:
        """(skill, its LoadedSkill, tunable) for a parameter '<skill>.<tunable>', else None."""
        skill, _, rest = name.partition('.')
        loaded = self.library.get(skill) if rest else None
        return (skill, loaded, rest) if loaded is not None else None

    def _validate_parameters(self, values: dict[str, Any]) -> tuple[bool, str]:
        for name, value in values.items():
            if name == 'activate_skill':
                if not isinstance(value, str):
                    return False, f'activate_skill must be a skill name, got {value!r}'
                if value:
                    problem = self._cannot_activate(value)
                    if problem:
                        return False, problem
                continue
            if name in STARTUP_PARAMETERS or (name.startswith('watchdog.')
                                              and name != 'watchdog.reduced_mode'):
                return False, f'{name} is read at start-up only; restart the node to change it'
            if name == 'watchdog.reduced_mode':
                if not isinstance(value, bool):
                    return False, f'{name} must be true or false, got {value!r}'
                continue
            found = self._tunable(name)
            if found is None:
                continue
            skill, loaded, param = found
            try:
                info = loaded.compiled.params[loaded.compiled.param_index(param)]
            except KeyError:
                return False, f'skill {skill!r} has no tunable {param!r}'
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                return False, f'{name} must be a number, got {value!r}'
            problem = info.check(float(value))
            if problem:
                return False, f'{skill}.{problem}'
        return True, ''

    def _apply_parameters(self, values: dict[str, Any]) -> None:
        per_skill: dict[str, dict[int, float]] = {}
        target = values.get('activate_skill') or None
        for name, value in values.items():
            if name == 'watchdog.reduced_mode':
                self.watchdog.set_reduced_mode(bool(value))
                continue
            found = self._tunable(name)
            if found is None:
                continue
            skill, loaded, param = found
            per_skill.setdefault(skill, {})[loaded.compiled.param_index(param)] = float(value)
        if target is not None:
            # tunables of the skill being activated go in with the switch, in one tick
            changes = per_skill.pop(target, {})
            for skill, other in per_skill.items():
                self.loop.set_parameters(skill, other)
            ok, message = self.loop.request_activation(target, timeout=max(1.0, 20 * self.dt),
                                                       params=changes)
            self.port.log('info' if ok else 'warn', f'activate_skill {target}: {message}')
            return
        for skill, changes in per_skill.items():
            self.loop.set_parameters(skill, changes)

    def stats(self) -> dict[str, Any]:
        """Measured on the node's monotonic clock: latency sample arrival -> command published
        (tick_on joint_states only), switch delays in ticks, ticks, missed timer periods."""
        n = min(self._latency_count, self._latency_ns.size)
        lat = self._latency_ns[:n] / 1000.0
        delays = np.array(self.loop.switch_delays) / self.dt
        pct = (lambda a, q: round(float(np.percentile(a, q)), 2)) if n else None
        return {
            'ticks': self._ticks, 'tick_errors': self._errors,
            'timer_missed': int(getattr(self.timer, 'missed', 0)),
            'latency_us': None if not n else {
                'samples': int(n), 'p50': pct(lat, 50), 'p90': pct(lat, 90),
                'p99': pct(lat, 99), 'max': round(float(lat.max()), 2)},
            'switch_delay_ticks': None if not delays.size else {
                'count': int(delays.size), 'p50': round(float(np.median(delays)), 3),
                'max': round(float(delays.max()), 3)},
        }

    # ------------------------------------------------------------ shutdown
    def close(self) -> None:
        """After spin() returned (callbacks no longer run on either transport): zero, close."""
        self._closing = True
        with self._tick_lock:
            for _ in range(3):
                self._send_zero()
        recorder = self.recorder
        self.port.log('info', 'shutting down: zero command sent'
                      + (', closing the bag' if recorder is not None else ''))
        if recorder is not None:
            recorder.close()      # never raises: a failure is logged through on_failure
            if recorder.state == 'closed':
                self.port.log('info', f'bag {recorder.path} closed: {recorder.written} '
                              f'messages, {recorder.dropped + self._record_errors} dropped')


def build_arg_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog='constraint-ctrl run',
                                     description='Start the controller node.')
    transport_options(parser)
    parser.add_argument('--record', type=Path, help='write a rosbag2 (MCAP) to this new folder')
    parser.add_argument('--stats', type=Path, help='write timing statistics (JSON) at exit')
    return parser


def run(argv: list[str]) -> int:
    ours, ros = split_ros_args(argv)
    args = build_arg_parser().parse_args(ours)
    from ..transport.port import open_port
    port = open_port(args.transport, NODE_NAME, ros, distro=args.distro)
    node = serve(port, lambda: ControllerNode(port, record=args.record))
    if node is not None and args.stats:
        args.stats.write_text(json.dumps(node.stats(), indent=2) + '\n')
    return 0


def main(argv: list[str] | None = None) -> int:
    """Entry point for `ros2 run constraint_ctrl controller_node` and launch files."""
    import sys
    from ..cli import report_errors
    return report_errors(run, list(sys.argv[1:] if argv is None else argv))


__all__ = ['ControllerNode', 'NODE_NAME', 'main', 'run']
