"""The controller node: joint states and sensors in, one QP per tick, velocity commands out.

The node only moves data between the port (rclpy or direct DDS) and the middleware-free
ControlLoop. Interface (names relative to the node, default node name constraint_controller):

- subscribes joint_states (sensor_msgs/JointState, matched by name), every topic a skill input
  is mapped to (parameters inputs.<input>.topic/type/field/scale/frame) and the
  person-position topics in people.sources (geometry_msgs/PointStamped in any frame: put into
  base_frame with tf, see nodes/points_in_base.py), and /tf, /tf_static (on rclpy through
  tf2_ros's TransformListener); with robot_description_source 'topic' it takes its robot
  model from robot_description (std_msgs/String, transient local) at start;
- publishes ~/command (std_msgs/Float64MultiArray, joint velocities in the order of
  joint_names) and/or ~/position_command (joint positions, parameter command_interfaces; see
  nodes/outputs.py), ~/joint_command (sensor_msgs/JointState: the same velocities (and
  positions) with names, stamped with the joint_states sample they answer), ~/events
  (std_msgs/String), ~/status and ~/rows (diagnostic_msgs/DiagnosticArray at status_rate_hz),
  /diagnostics (about 1 Hz) and ~/markers (visualization_msgs/MarkerArray; nodes/status.py,
  nodes/markers.py);
- serves ~/skills/<skill>/activate, ~/hold and ~/reload_skills (std_srvs/Trigger) and the
  standard parameter services; each skill's tunables are parameters <skill>.<tunable>.

The node starts in the control loop's built-in hold (zero velocity, watchdog active; see
runtime/loop.py) and returns to it on ~/hold or activate_skill = hold.

A managed node (ROS 2 lifecycle, nodes/lifecycle.py; the standard services ~/change_state,
~/get_state, ~/get_available_states, ~/get_available_transitions and ~/transition_event):
unconfigured at start; configure reads the parameters, loads the robot model and the skills,
declares the tunables and creates everything above; inactive, it ticks the watchdog but
publishes only zero commands and ~/status; active, it controls (no skill runs until one is
activated, or initial_skill once per configuration); deactivate holds, then inactive; cleanup
releases all configure made; shutdown sends zero commands, then finalized. `run` configures
and activates by itself unless --no-autostart.

Joint states are judged per joint: a valid sample refreshes exactly the model joints it names,
and every joint must be fresh for the watchdog to let the arm move; malformed samples are
rejected whole, counted in ~/status and logged once (see _on_joint_states).

Parameters: only tunables (with their ranges in the descriptors), watchdog.reduced_mode and the
write-only activate_skill change anything at run time; everything else is refused with a
reason. What is read back is always the value in force (refused launch values are replaced by
the file's value). Activation replies come after the new skill's first tick with its outcome.
A reload keeps values set at run time, undeclares removed skills' parameters and switches the
running skill to its reloaded version at a tick boundary (see _on_reload).

Threads: the control tick runs on the port's timer thread (or on the joint_states callback with
tick_on = joint_states); callbacks only store the latest samples under a lock. Any exception in
a tick publishes a zero command; so does shutdown. An exception in a service or parameter
callback is an error reply and a log line, never an exit.
"""
from __future__ import annotations

import argparse
import json
import math
import os
import sys
import threading
import time
import traceback
from dataclasses import dataclass, field
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np

from ..errors import ConstraintCtrlError, TransportError
from ..runtime.library import HOLD, SkillLibrary
from ..runtime.loop import ControlLoop, InputSample, LoopOutput, Snapshot
from ..runtime.realtime import RealtimeControl, check_priority, threads_named
from ..runtime.watchdog_setup import DEFAULTS as WATCHDOG_DEFAULTS
from ..runtime.watchdog_setup import build_watchdog
from ..safety.watchdog import PersonSample
from ..solve.qp import QP_SOLVERS
from ..transport.port import RECEIVE_THREADS
from .common import config_dir, ros_arguments, serve, split_ros_args, transport_options
from .lifecycle import serve_lifecycle
from ..problem_log import ProblemLog
from .inputs import MAX_JOINT_NAMES, TYPE_ATTRIBUTE, InputMapping, capture_time, check_field, \
    joint_sample_problem, parse_input_mappings
from .points_in_base import PARAMETERS as FRAMES_PARAMETERS
from .points_in_base import open_points_in_base
from .robot_source import PARAMETERS as MODEL_PARAMETERS
from .robot_source import declare_model_source, load_robot_model, watch_robot_description
from .markers import MarkerBuilder, MarkerJob, SkillShapes
from .outputs import DEFAULT_COMMAND_INTERFACES, PositionTarget, parse_command_interfaces, \
    position_message
from .parameter_types import checked_value
from .status import StatusWorker, build_rows, build_status

NODE_NAME = 'constraint_controller'
SWITCH_INTERVAL_S = 0.0005   # interpreter lock hand-over between threads (Python's default 5 ms)
#: Longest wait at shutdown for the hold's ramp to zero (SIGINT/SIGTERM should end promptly).
SHUTDOWN_RAMP_S = 1.0
#: Parameters read at configure: settable while the node is unconfigured, refused while configured.
STARTUP_PARAMETERS = (*MODEL_PARAMETERS, 'skills_folder', 'joint_names', 'rate_hz',
                      'status_rate_hz', 'initial_skill', 'tick_on', 'base_frame',
                      'people.sources', 'people.timeout', *FRAMES_PARAMETERS,
                      'command_interfaces', 'hardware_id', 'diagnostics_rate_hz',
                      'markers_rate_hz', 'qp_solver')
#: Names of the node's own parameters and parameter groups (and those rclpy declares on every
#: node): a skill named like one would mix its tunables into them, so it is refused at load.
NODE_PARAMETER_GROUPS = tuple(sorted(
    {n.split('.')[0] for n in STARTUP_PARAMETERS}
    | {'inputs', 'watchdog', 'activate_skill', 'use_sim_time', 'qos_overrides',
       'start_type_description_service'}))


@dataclass
class _Made:
    """What configure created on the port, for cleanup to destroy."""

    publishers: list[Any] = field(default_factory=list)
    subscriptions: list[Any] = field(default_factory=list)
    services: list[Any] = field(default_factory=list)


class ControllerNode:
    def __init__(self, port: Any, record: Path | None = None,
                 realtime: RealtimeControl | None = None) -> None:
        """A managed node in the unconfigured state: nothing loaded, nothing created but the
        lifecycle services (see the lifecycle section below); configure() does the rest."""
        self.port = port
        self.realtime = realtime
        if realtime is not None:   # memory and the transport's receive threads now; the
            # threads that tick switch themselves when they first run
            port.log('info', f'realtime: {realtime.start(threads_named(RECEIVE_THREADS))}')
        self._lock = threading.Lock()
        self._tick_lock = threading.Lock()
        # set while the last command sent was all zeros: leaving active waits for it, so the
        # hold's ramp (within the acceleration limit) is not cut short by a zero command
        self._at_rest = threading.Event()
        self._at_rest.set()
        # lifecycle: configured from configure() to cleanup(); active from activate() to
        # deactivate(); ticks read both under the tick lock
        self.configured = False
        self.active = False
        self._closing = False
        self._made = _Made()
        self.model: Any = None
        self.watchdog: Any = None
        self.library: Any = None
        self.loop: Any = None
        self.timer: Any = None
        self._status: StatusWorker | None = None
        self._markers: StatusWorker | None = None
        self._node_parameters: set[str] = set()   # declared once, read at each configure
        self._declaring: set[str] = set()      # parameters the node is (re)declaring now
        self._user_set: set[str] = set()       # tunables set at launch or at run time
        self._declared: dict[str, list[str]] = {}   # skill -> its declared tunables
        self._switched_with: set[str] = set()  # applied with the last activate_skill switch
        self._reload_values: dict[str, dict[str, float]] = {}
        self._reload_notes: list[str] = []
        self._param_problems = ProblemLog(port.log)
        # statistics over the node's whole life (all configurations)
        self._latency_ns = np.zeros(1 << 20, dtype=np.int64)
        self._latency_count = 0
        self._ticks = 0
        self._errors = 0
        self._switch_delays: list[float] = []
        # the bag: opened by the first configure, closed with the node
        self.recorder: Any = None
        self._record_to = record
        self._bag_topics: dict[str, tuple[str, str]] = {}  # name used -> (type, qos profile)
        self._bag_added: set[str] = set()                   # names the recorder has
        self._bag_names: dict[str, str] = {}               # publisher's topic -> name used
        self._recorded_here: set[str] = set()  # recorded by a subscription of this config
        self._record_errors = 0
        port.set_parameter_validator(self._validate_parameters)
        port.add_parameter_listener(self._apply_parameters)
        self.lifecycle = serve_lifecycle(port, {
            'configure': self.configure, 'activate': self.activate,
            'deactivate': self.deactivate, 'cleanup': self.cleanup,
            'shutdown': self.shutdown, 'error': self.on_error})
        port.log('info', f'{NODE_NAME} unconfigured (a managed node: configure, then activate)')

    # ------------------------------------------------------------ lifecycle
    # Transitions run one at a time on the port's service thread (or from run() for
    # --autostart and close()); ticks run on the timer thread. Each step returns None or the
    # reason it failed (the transition fails and the state stays); an exception is a
    # transition error, whose step (on_error) releases everything: back to unconfigured.
    def configure(self) -> str | None:
        """Read the parameters, load the robot model and skills, declare the tunables,
        create subscriptions, publishers, services and the timer. Inactive afterwards: ticks
        publish zero commands and status only. A problem the user can fix (a bad URDF, no
        skills folder, a bad parameter) fails the transition with its reason."""
        try:
            self._configure()
        except (ConstraintCtrlError, OSError) as exc:
            self._release()
            return str(exc)
        except BaseException:
            self._release()
            raise
        return None

    def activate(self) -> str | None:
        """Control ticks from the next tick on; no skill runs until one is activated (or
        initial_skill, once per configuration, when joint states arrive)."""
        with self._tick_lock:
            self.active = True
        self.port.log('info', f'{NODE_NAME} ready (active): {len(self.library.names())} '
                      f'skills, {self.rate:g} Hz, tick on {self.tick_on}, transport '
                      f'{type(self.port).__name__}')
        return None

    def deactivate(self) -> str | None:
        """Hold (the running skill stops at a tick boundary), let the hold ramp the joint
        speeds down to zero, then inactive: zero commands."""
        if not self.loop.holding:    # the hold's tick still publishes (its 'holding' event)
            ok, message = self.loop.request_hold(self._switch_timeout)
            if not ok:
                self.port.log('warn', f'deactivate: {message}; going inactive anyway')
        self._come_to_rest('deactivate', self._switch_timeout)
        with self._tick_lock:
            self._hold()
            self.active = False
            self._send_zero()
        self.port.log('info', 'inactive: zero commands and status only')
        return None

    def cleanup(self) -> str | None:
        """Back to unconfigured: release all that configure made."""
        self._release()
        self.port.log('info', 'unconfigured: model, skills, topics and services released')
        return None

    def shutdown(self) -> str | None:
        """From any primary state: zero command (when configured), release, finalized."""
        if self.configured:
            # asked for while ticking (ros2 lifecycle set ... shutdown): the hold ramps down
            # first; from close() (SIGINT/SIGTERM, ticks already over) the same ramp without
            # ticks (_ramp_down_after_ticks)
            if self.active and not self._closing:
                with self._tick_lock:
                    self._hold()
                self._come_to_rest('shutdown', SHUTDOWN_RAMP_S)
            with self._tick_lock:
                self._hold()
                if self.active and self._closing:
                    self._ramp_down_after_ticks()
                self.active = False
                for _ in range(3):
                    self._send_zero()
            self.port.log('info', 'shutting down: zero command sent')
        # the publishers stay: the port flushes what they wrote when it closes
        self._release(keep_publishers=True)
        return None

    def on_error(self) -> str | None:
        """After a step raised: zero command where possible, release, back to unconfigured."""
        if self.configured:
            with self._tick_lock:
                self.active = False
                try:
                    self._send_zero()
                except Exception:  # noqa: BLE001 - releasing matters more now
                    pass
        self._release()
        return None

    def _come_to_rest(self, why: str, timeout: float) -> None:
        """Wait (ticks go on) until the hold has brought the command to zero within the
        acceleration limit, at most ``timeout`` s; what comes after sends zero in any case."""
        if not self._at_rest.wait(timeout):
            self.port.log('warn', f'{why}: the arm did not come to rest within {timeout:g} s '
                          '(no ticks?); sending zero now')

    def _hold(self) -> None:
        """Queue the loop's built-in hold for the next tick without waiting (safe with the
        tick lock held): zero velocity, watchdog still running."""
        if self.loop is not None and not self.loop.holding:
            self.loop.request_hold()

    @staticmethod
    def _read_at_configure(name: str) -> bool:
        """A node parameter that configure reads: settable while unconfigured only."""
        return name in STARTUP_PARAMETERS or (name.startswith('watchdog.')
                                              and name != 'watchdog.reduced_mode')

    def _param(self, name: str, default: Any, description: str,
               read_only: bool = True) -> Any:
        """Declare a node parameter at the first configure; later configures read the value
        in force. Those read at configure stay settable, but the validator accepts a new value
        only while unconfigured (after a failed configure or a cleanup); the rest are
        read-only (inputs.*)."""
        if name in self._node_parameters:
            return checked_value(name, default, self.port.get_parameter(name).value)
        if self._read_at_configure(name):
            read_only = False
            description += ' (read at configure; set it while unconfigured)'
        self._declaring.add(name)
        try:
            value = self.port.declare_parameter(name, default, description,
                                                read_only=read_only).value
        finally:
            self._declaring.discard(name)
        self._node_parameters.add(name)
        return checked_value(name, default, value)

    def _declare_view(self, name: str, value: Any, description: str = '',
                      read_only: bool = True) -> Any:
        """_param as port.declare_parameter answers (an object with .value), for the helpers
        that declare node parameters (robot_source, points_in_base, outputs)."""
        return SimpleNamespace(name=name, value=self._param(name, value, description,
                                                            read_only))

    def _configure(self) -> None:
        port = self.port
        cfg = config_dir()
        declare = self._param
        self.model_source = declare_model_source(self._declare_view,
                                                 cfg / 'robots' / 'six_axis_arm.urdf')
        self._load_model()
        watch = watch_robot_description(port, self.model_source, self.loaded_model)
        if watch is not None:
            self._made.subscriptions.append(watch)
        robot = self.loaded_model.origin
        names = list(declare('joint_names', list(self.model.joint_names),
                             'joint order of ~/command'))
        if sorted(names) != sorted(self.model.joint_names):
            msg = (f'parameter joint_names {names} must list exactly the movable joints of '
                   f'{robot}: {list(self.model.joint_names)}')
            raise ConstraintCtrlError(msg)
        self.joint_names = names
        self._to_command = np.array([self.model.joint_names.index(j) for j in names])
        self._joint_index = {j: i for i, j in enumerate(self.model.joint_names)}
        self.rate = float(declare('rate_hz', 500.0, 'control rate (Hz)'))
        self.dt = 1.0 / self.rate
        status_rate = float(declare('status_rate_hz', 10.0, '~/status rate (Hz)'))
        self._status_every = max(1, round(self.rate / status_rate))
        self.tick_on = str(declare('tick_on', 'timer', 'timer, or joint_states (tick on each '
                                   'sample, timer as fallback)'))
        if self.tick_on not in ('timer', 'joint_states'):
            msg = f"parameter tick_on must be 'timer' or 'joint_states', got {self.tick_on!r}"
            raise ConstraintCtrlError(msg)
        self.base_frame = str(declare('base_frame', self.model.base_link, 'tf frame of the '
                                      "model's base link (default its root link): person "
                                      'positions are put into it'))
        sources = [str(s) for s in declare('people.sources', [''],
                                           'PointStamped topics of person positions') if s]
        person_timeout = float(declare('people.timeout', 0.2, 's'))
        settings = {}
        for key, default in WATCHDOG_DEFAULTS.items():
            settings[key] = declare(f'watchdog.{key}', default, f'watchdog {key}',
                                    read_only=key != 'reduced_mode')
        self.watchdog = build_watchdog(self.model, self.dt, settings,
                                       {s: person_timeout for s in sources})
        folder = Path(str(declare('skills_folder', str(cfg / 'skills'),
                                  'folder of skill files')))
        if not folder.is_dir():
            msg = f'skills folder {folder} does not exist (parameter skills_folder)'
            raise ConstraintCtrlError(msg)
        # qp_solver: the QP solver of every skill (solve/qp.py), read at configure
        qp_solver = str(declare('qp_solver', QP_SOLVERS[0], 'QP solver of every skill: '
                                + ', '.join(QP_SOLVERS)))
        if qp_solver not in QP_SOLVERS:
            msg = f'parameter qp_solver must be one of {", ".join(QP_SOLVERS)}, got {qp_solver!r}'
            raise ConstraintCtrlError(msg)
        self.library = SkillLibrary(folder, self.model.joint_names, qp_solver=qp_solver,
                                    reserved=NODE_PARAMETER_GROUPS, model=self.model)
        report = self.library.reload()
        for line in report.log_lines():   # one failed file per line
            port.log('info' if report.ok else 'warn', f'skills: {line}')
        self.loop = ControlLoop(self.library, self.watchdog, self.dt, person_sources=sources)
        # how long a switch request waits for its first tick (below the 5 s our sequencer
        # allows for the reply); one not taken by then is withdrawn
        self._switch_timeout = max(3.0, 20 * self.dt)
        self._initial = str(declare('initial_skill', '', 'skill to activate at start'))
        declare('activate_skill', '', 'write-only (reads back empty): setting it activates that '
                'skill, together with its tunables set in the same (atomic) call, or the '
                f'built-in hold ({HOLD}); the reply comes after the first tick of the new skill, '
                'with its outcome', read_only=False)
        inputs = port.get_parameters_by_prefix('inputs')
        self.mappings = parse_input_mappings({k: v.value for k, v in inputs.items()})
        for key, param in inputs.items():   # mapped at configure only: read-only from now on
            declare(f'inputs.{key}', param.value, 'skill input mapping (read at configure)')
        self._user_set = set()
        self._declared = {}

        # latest samples (guarded by self._lock)
        n = self.model.n_joints
        self._last_sent = np.zeros(n)     # the last velocity command sent (model order)
        # per model joint (plain lists: a sample writes a few items, a tick copies them once)
        self._q = [math.nan] * n
        self._seen = [False] * n
        self._joint_stamps = [math.nan] * n       # each joint's last valid update (monotonic s)
        self._js_plans: dict[tuple[str, ...], list[tuple[int, int]]] = {}
        self._js_rejected = 0
        self._js_problems = ProblemLog(port.log)
        self._js_stamp: float | None = None
        self._js_header = (0, 0)
        self._answered = (0, 0)   # stamp of the joint_states sample the current tick answers
        self._inputs: dict[str, InputSample] = {}
        self._people: dict[str, PersonSample] = {}
        self._last_tick = 0.0
        # arrival of a joint_states sample -> its command published (tick_on joint_states)
        self._arrived_ns = 0
        self._answered_arrival = 0   # arrival of the sample the current tick answers
        self._command_msgs: tuple[Any, Any] | None = None   # built on first use, then reused

        t = port.types
        self._recorded_here = set()
        self._setup_outputs(settings, status_rate)
        self._pub_events = self._publisher(t.String, '~/events', 'default')
        self._pub_status = self._publisher(t.DiagnosticArray, '~/status', 'default')
        # frames hook: /tf and /tf_static (DDS) or tf2_ros (rclpy); persons and point inputs
        self.points = open_points_in_base(port, self._declare_view, self.base_frame,
                                          self._subscribe)
        self._person_problems = self.points.person_faults
        self._subscribe(t.JointState, 'joint_states', self._on_joint_states)
        for mapping in self.mappings.values():
            msg_type = getattr(t, TYPE_ATTRIBUTE[mapping.ros_type])
            check_field(mapping, msg_type())
            self._subscribe(msg_type, mapping.topic, self._input_callback(mapping))
        for source in sources:
            self._subscribe(t.PointStamped, source, self._person_callback(source))
        self._services: dict[str, object] = {}
        self._made.services.append(port.create_service(
            t.Trigger, '~/reload_skills', self._guarded('~/reload_skills', self._on_reload)))
        self._made.services.append(port.create_service(
            t.Trigger, '~/hold', self._guarded('~/hold', self._on_hold)))
        for name in self.library.names():
            self._add_skill(name)
        # with --realtime the status thread runs one step below the tick: a normal-priority
        # thread that holds the interpreter lock when the machine preempts it would hold up
        # the tick behind it
        self._status = StatusWorker(
            self._publish_status, port.log, name=f'{NODE_NAME}-status',
            on_start=None if self.realtime is None else lambda: self._enter_realtime(below=1))
        self._markers = StatusWorker(
            self._publish_markers, port.log, name=f'{NODE_NAME}-markers', what='~/markers',
            on_start=None if self.realtime is None else lambda: self._enter_realtime(below=1))
        self._add_bag_topics()
        with self._tick_lock:
            self.configured = True
        self.timer = port.create_timer(self.dt, self._on_timer, control=True)
        port.log('info', f'{NODE_NAME} configured (inactive: zero commands and status)')

    def _release(self, keep_publishers: bool = False) -> None:
        """Undo configure (also a partial one): stop ticking, destroy what it created,
        undeclare the tunables. Node parameters stay declared (read again at configure)."""
        with self._tick_lock:
            self.configured = False
            self.active = False
            timer, self.timer = self.timer, None
        port = self.port
        if timer is not None:
            port.destroy_timer(timer)
        for worker in (self._status, self._markers):
            if worker is not None:
                worker.close()
        self._status = self._markers = None
        if self.loop is not None:
            self._switch_delays.extend(self.loop.switch_delays)
        points = getattr(self, 'points', None)
        if points is not None:     # tf2_ros on rclpy made subscriptions and a service itself
            points.close()
        made, self._made = self._made, _Made()
        for sub in made.subscriptions:
            port.destroy_subscription(sub)
        for pub in [] if keep_publishers else made.publishers:
            port.destroy_publisher(pub)
        for handle in [*made.services, *getattr(self, '_services', {}).values()]:
            port.destroy_service(handle)
        self._services = {}
        for skill, params in self._declared.items():
            for param in params:
                self._undeclare(f'{skill}.{param}')
        self._declared = {}
        self._user_set = set()
        self.loop = self.library = self.watchdog = self.model = None

    def _load_model(self, receive: Any = None) -> None:
        """The robot model from robot_description_file or the robot_description topic (see
        nodes/robot_source.py): one step, so a configure transition can call it."""
        self.loaded_model = load_robot_model(self.port, self.model_source, receive)
        self.model = self.loaded_model.model

    # ------------------------------------------------------------ outputs (issue 9.4)
    def _setup_outputs(self, settings: dict[str, Any], status_rate: float) -> None:
        """Command interfaces, ~/rows, /diagnostics and ~/markers (nodes/outputs.py,
        status.py, markers.py); all read at configure."""
        declare, t = self._declare_view, self.port.types
        self.command_interfaces = parse_command_interfaces(declare(
            'command_interfaces', DEFAULT_COMMAND_INTERFACES, 'velocity (~/command) and/or '
            'position (~/position_command)', read_only=True).value)
        self.hardware_id = str(declare('hardware_id', self.model.description.name or NODE_NAME,
                                       'hardware_id in /diagnostics', read_only=True).value)
        diagnostics_rate = float(declare('diagnostics_rate_hz', 1.0, '/diagnostics rate (Hz)',
                                         read_only=True).value)
        markers_rate = float(declare('markers_rate_hz', 5.0, '~/markers rate (Hz), 0 = off',
                                     read_only=True).value)
        if not (0.0 < diagnostics_rate <= status_rate) or not (0.0 <= markers_rate <= self.rate):
            msg = (f'parameters diagnostics_rate_hz must be > 0 and at most status_rate_hz '
                   f'({status_rate:g}), markers_rate_hz 0 (off) to rate_hz ({self.rate:g}); got '
                   f'{diagnostics_rate:g} and {markers_rate:g}')
            raise ConstraintCtrlError(msg)
        self._diagnostics_every = max(1, round(status_rate / diagnostics_rate))
        self._markers_every = max(1, round(self.rate / markers_rate)) if markers_rate else 0
        self._status_count = 0
        velocity = 'velocity' in self.command_interfaces
        self._pub_command = (self._publisher(t.Float64MultiArray, '~/command', 'command')
                             if velocity else None)
        self._position: PositionTarget | None = None
        if 'position' in self.command_interfaces:
            self._position = PositionTarget(self._to_command, self.dt,
                                            float(settings['joint_state_timeout']))
            self._position_msg = position_message(t, self.joint_names)
            self._pub_position = self._publisher(t.Float64MultiArray, '~/position_command',
                                                 'command')
        self._pub_joint_command = self._publisher(t.JointState, '~/joint_command', 'command')
        self._pub_rows = self._publisher(t.DiagnosticArray, '~/rows', 'default')
        self._pub_diagnostics = self._publisher(t.DiagnosticArray, '/diagnostics', 'default')
        self._pub_markers = None
        if self._markers_every:
            self._pub_markers = self._publisher(t.MarkerArray, '~/markers', 'default')
            self._marker_builder = MarkerBuilder(self.port, self.base_frame,
                                                 self._markers_every * self.dt)
            self._skill_shapes = SkillShapes()

    def _send_position(self, target: list[float] | None, joint: Any) -> None:
        """On the tick: ~/position_command, and the same positions in ~/joint_command."""
        joint.position = target if target is not None else []
        if target is not None:
            self._position_msg.data = target
            self._publish(self._pub_position, '~/position_command', self._position_msg)

    def _marker_job(self) -> MarkerJob:
        """On the tick: copies of what ~/markers draws (the worker builds the message)."""
        runner = self.loop.active
        ran = runner is not None and runner.solver.last_status.value == 'ok'
        return MarkerJob(self.watchdog.geometry(), runner.skill if ran else None,
                         runner.solver.input_values() if ran else None, self.port.now_ns())

    def _publish_markers(self, job: MarkerJob) -> None:
        """On the marker thread (a StatusWorker)."""
        shapes = self._skill_shapes.shapes(job.skill, job.skill_inputs)
        self._publish(self._pub_markers, '~/markers', self._marker_builder.build(job, shapes))

    # ------------------------------------------------------------ plumbing
    # The bag names each topic as the port really used it: the fully qualified name after
    # remapping, from the publisher's or subscription's topic_name (rclpy's property, which the
    # DDS port mirrors). Two entities on one topic record it once.
    def _publisher(self, msg_type: Any, topic: str, qos: str) -> Any:
        pub = self.port.create_publisher(msg_type, topic, qos)
        self._made.publishers.append(pub)
        name = str(pub.topic_name)
        self._bag_names[topic] = name
        self._bag_add(name, self.port.type_name(msg_type), qos)
        return pub

    def _subscribe(self, msg_type: Any, topic: str, callback: Any, qos: str = 'latest') -> Any:
        # 'latest': what the tick reads, the control path; other profiles (/tf, /tf_static)
        # feed state the callbacks read, off the control path
        control = qos == 'latest'
        if self._record_to is None:
            sub = self.port.create_subscription(msg_type, topic, callback, qos,
                                                control=control)
            self._made.subscriptions.append(sub)
            return sub
        records_to: list[str] = []      # the bag topic, unless another subscription has it

        def recorded(msg: Any) -> None:
            if records_to:
                self._record(records_to[0], msg)
            callback(msg)
        sub = self.port.create_subscription(msg_type, topic, recorded, qos, control=control)
        self._made.subscriptions.append(sub)
        name = str(sub.topic_name)
        if name not in self._recorded_here:
            self._recorded_here.add(name)
            self._bag_add(name, self.port.type_name(msg_type), 'sensor' if control else qos)
            records_to.append(name)
        return sub

    def _open_recorder(self) -> None:
        """At the end of the first configure, so the bag folder appears once the node is
        configured (`constraint-ctrl demo` starts its sequencer then) and a node that never
        configures leaves none behind; `run` checks the folder at start (record_folder_problem)."""
        if self._record_to is None or self.recorder is not None:
            return
        from ..transport.bag import BagRecorder
        recorder = BagRecorder(self._record_to, distro=self.port.distro,
                               on_failure=lambda text: self.port.log('error', text))
        for name, (ros_type, qos) in self._bag_topics.items():
            recorder.add_topic(name, ros_type, qos)
            self._bag_added.add(name)
        self.recorder = recorder

    def _bag_add(self, name: str, ros_type: str, qos: str) -> None:
        """A topic of this configuration into the bag (once over all configurations), before
        its first message can come."""
        self._bag_topics.setdefault(name, (ros_type, qos))
        if self.recorder is not None and name not in self._bag_added:
            self.recorder.add_topic(name, ros_type, qos)
            self._bag_added.add(name)

    def _add_bag_topics(self) -> None:
        """Last step of configure: open the bag (first time) and say what is recorded."""
        self._open_recorder()
        if self.recorder is not None:
            self.port.log('info', f'recording {len(self._bag_added)} topics to '
                          f'{self._record_to} (rosbag2 for ROS 2 {self.port.distro})')

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
        """Per joint: a valid sample refreshes exactly the model joints it names.

        A sample is checked whole first (size bound, lengths, duplicates, non-finite values) and
        rejected whole on any problem; it is counted and logged once (ProblemLog). A rejected
        sample that names model joints also invalidates them (their data can no longer be
        trusted), so the watchdog stops at once rather than after the timeout. Samples that
        carry none of the model's joints (a gripper's) refresh nothing.
        """
        arrived = time.perf_counter_ns()
        if self.realtime is not None:
            self._enter_realtime()
        names = msg.name
        positions = msg.position
        key = tuple(names) if len(names) <= MAX_JOINT_NAMES else None
        plan = self._js_plans.get(key) if key is not None else None
        problem = joint_sample_problem(names, positions, names_checked=plan is not None)
        if problem is not None:
            self._reject_joint_states(problem, names)
            return
        if plan is None:
            # (sample position, model joint) pairs of this name list, cached: publishers repeat
            # the same names every sample (a few lists per cell: arm, gripper, ...)
            index = self._joint_index
            plan = [(k, index[name]) for k, name in enumerate(names) if name in index]
            if len(self._js_plans) >= 16:
                self._js_plans.clear()
            self._js_plans[key] = plan            # type: ignore[index]
        if plan:
            stamp = self._stamp(msg.header)
            with self._lock:
                q, stamps, seen = self._q, self._joint_stamps, self._seen
                for k, i in plan:
                    q[i] = positions[k]
                    stamps[i] = stamp
                    seen[i] = True
                self._js_stamp = stamp
                self._js_header = (msg.header.stamp.sec, msg.header.stamp.nanosec)
                self._arrived_ns = arrived
        self._js_problems.ok('joint_states', 'valid samples again')
        if plan and self.tick_on == 'joint_states':
            # waits for a fallback tick that runs on the timer's thread (DDS port), so this
            # sample is still answered, right after it
            self._tick(wait=True)
            # the fallback timer stands in only when samples stop: on rclpy each timer call
            # costs an executor wake-up, so it restarts its period after every sample's tick
            self.timer.reset()

    def _reject_joint_states(self, problem: tuple[str, str], names: Any) -> None:
        kind, detail = problem
        invalidated: set[str] = set()
        if kind != 'too many names':
            index = self._joint_index
            with self._lock:
                for name in names:
                    i = index.get(name)
                    if i is not None:
                        self._joint_stamps[i] = math.nan
                        invalidated.add(name)
        self._js_rejected += 1
        if invalidated:
            detail += (f'; it named joints {", ".join(sorted(invalidated)[:6])}, which count '
                       'as stale until a valid sample')
        self._js_problems.problem('joint_states', f'sample rejected ({kind})', detail)

    def _input_callback(self, mapping: InputMapping) -> Any:
        def callback(msg: Any) -> None:
            try:
                value = (self.points.input_value(mapping, msg) if mapping.frame
                         else mapping.extract(msg))
            except (TypeError, ValueError):
                value = float('nan')
            stamp = self._stamp(msg.header) if mapping.has_header else time.monotonic()
            with self._lock:   # a new dict: a tick's snapshot keeps the one it took
                self._inputs = {**self._inputs, mapping.name: InputSample(value, stamp)}
        return callback

    def _person_callback(self, source: str) -> Any:
        points = self.points

        def callback(msg: Any) -> None:
            # in base_frame; NaN when it cannot be put there (no or too old transform): the
            # watchdog then counts a person anywhere. Faults are counted and logged once.
            point = points.person(source, msg)
            sample = PersonSample(source, point, self._stamp(msg.header))
            with self._lock:   # a new dict: a tick's snapshot keeps the one it took
                self._people = {**self._people, source: sample}
        return callback

    # ----------------------------------------------------------------- tick
    def _on_timer(self) -> None:
        if self.tick_on == 'joint_states' and \
                time.monotonic() - self._last_tick < 1.5 * self.dt:
            return
        self._tick()

    def _snapshot(self) -> Snapshot:
        with self._lock:
            # the command of this tick answers the latest sample in this snapshot, not one that
            # arrives while the tick runs (its arrival: for the node's latency statistics)
            self._answered = self._js_header
            self._answered_arrival, self._arrived_ns = self._arrived_ns, 0
            seen = all(self._seen)
            q = np.array(self._q) if seen else None
            missing = [] if seen else [j for j, s in zip(self.model.joint_names, self._seen)
                                       if not s]
            # inputs and people: the callbacks replace these dicts, never change them in
            # place, so the snapshot takes them as they are
            return Snapshot(now=time.monotonic(), q=q, joint_state_stamp=self._js_stamp,
                            inputs=self._inputs, people=self._people,
                            missing_joints=missing if self._js_stamp is not None else [],
                            joint_stamps=np.array(self._joint_stamps))

    def _enter_realtime(self, below: int = 0) -> None:
        """SCHED_FIFO for the thread that calls (once per thread, then one set lookup)."""
        line = self.realtime.enter(below)
        if line:
            self.port.log('warn' if self.realtime.refused and not self.realtime.granted
                          else 'info', f'realtime: {line}')

    def _tick(self, wait: bool = False) -> None:
        """One tick. ``wait``: for the tick lock (a sample's tick); without, a tick already
        running (the timer's fallback tick) makes this one unnecessary."""
        if self.realtime is not None:
            self._enter_realtime()
        if self._closing or not self._tick_lock.acquire(blocking=wait):
            return
        try:
            if self._closing or not self.configured:   # released meanwhile
                return
            snap = self._snapshot()
            if self._position is not None:
                self._position.take(snap)
            self._last_tick = snap.now
            if self.active and self._initial and snap.q is not None:
                self.loop.request_activation(self._initial)
                self._initial = ''
            # inactive: no skill runs (hold), the watchdog still judges the inputs for the
            # status, and what goes out is a zero command
            out = self.loop.step(snap)
            if self.active:
                self._send(out)
            else:
                self._send_zero()
                self._hold()       # a switch queued just before deactivate does not stay
            if self._answered_arrival:
                self._latency_ns[self._latency_count % self._latency_ns.size] = \
                    time.perf_counter_ns() - self._answered_arrival
                self._latency_count += 1
            self._ticks += 1
            if self._ticks % self._status_every == 0:
                self._send_status(out)
            # inactive: zero commands and status only; the rows and markers are the
            # control's output and stop with it
            if self.active and self._markers_every and self._ticks % self._markers_every == 0:
                self._markers.post(self._marker_job())
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
        """The two command messages, built once and refilled: only the velocities and the
        stamp change from tick to tick. Called with the tick lock held (ticks and close), and
        both ports serialise a message inside publish(), so reuse is safe."""
        msgs = self._command_msgs
        if msgs is None:
            t = self.port.types
            n = len(self.joint_names)
            msgs = self._command_msgs = (
                t.Float64MultiArray(layout=t.MultiArrayLayout(
                    dim=[t.MultiArrayDimension(label='joint_velocity', size=n, stride=n)],
                    data_offset=0), data=[0.0] * n),
                t.JointState(header=t.Header(stamp=t.Time(sec=0, nanosec=0), frame_id=''),
                             name=list(self.joint_names), position=[], velocity=[0.0] * n,
                             effort=[]))
        array, joint = msgs
        data = command_model[self._to_command].tolist()
        array.data = data
        joint.velocity = data
        stamp = joint.header.stamp
        sec, nanosec = self._answered
        stamp.sec, stamp.nanosec = int(sec), int(nanosec)
        return array, joint

    def _publish_commands(self, command: np.ndarray, target: list[float] | None) -> None:
        """One velocity command on ~/command and ~/joint_command, and with the position
        interface the position ``target`` (None: no ~/position_command this time); it becomes
        the last command sent (what leaving active ramps down from and waits on)."""
        np.copyto(self._last_sent, command)
        moving = bool(command.any())
        if moving == self._at_rest.is_set():      # only a change takes the event's lock
            if moving:
                self._at_rest.clear()
            else:
                self._at_rest.set()
        array, joint = self._command_messages(command)
        if self._position is not None:
            self._send_position(target, joint)
        if self._pub_command is not None:
            self._publish(self._pub_command, '~/command', array)
        self._publish(self._pub_joint_command, '~/joint_command', joint)

    def _send(self, out: LoopOutput) -> None:
        self._publish_commands(out.command, None if self._position is None
                               else self._position.target(out.command))
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
        self._publish_commands(np.zeros(self.model.n_joints),
                               None if self._position is None else self._position.hold())

    def _ramp_down_after_ticks(self) -> None:
        """Once the ticks have ended (close(): SIGINT/SIGTERM), bring the velocity commands
        from the last one sent to zero as the hold would: every joint at most a_max * dt
        closer to zero per period, never faster than before, within SHUTDOWN_RAMP_S. The
        position stream pauses meanwhile (its targets would need fresh joint states); the
        zero that follows latches its hold target."""
        step = np.asarray(self.watchdog.config.acceleration_limits, dtype=float) * self.dt
        command = self._last_sent.copy()
        for _ in range(max(1, round(SHUTDOWN_RAMP_S / self.dt))):
            if not command.any():
                return
            command = np.sign(command) * np.maximum(np.abs(command) - step, 0.0)
            self._publish_commands(command, None)
            time.sleep(self.dt)

    def _send_status(self, out: LoopOutput) -> None:
        """On the tick: take the rows of this solve; the worker builds and publishes."""
        self._status.post(*self._status_job(out))

    def _status_job(self, out: LoopOutput) -> tuple[LoopOutput, Any, list[str], bool]:
        """What only the tick can read consistently: its output, the rows of its solve and
        whether the node is active (inactive sends no ~/rows)."""
        runner = self.loop.active
        rows = runner.diagnostics() if runner is not None and out.tick is not None else None
        names = [r.name for r in runner.skill.rows] if runner is not None else []
        return out, rows, names, self.active

    def _publish_status(self, out: LoopOutput, rows: Any, names: list[str],
                        active: bool = True) -> None:
        """On the status thread (StatusWorker)."""
        recorder = self.recorder
        faults = self.port.faults().values()
        extra = {'missed_ticks': str(getattr(self.timer, 'missed', 0)),
                 'tick_errors': str(self._errors),
                 'joint_states_rejected': str(self._js_rejected),
                 'joint_states_last_rejection': self._js_problems.last_reason,
                 'person_samples_ignored': str(self._person_problems.total),
                 **self.points.report(),
                 'recorder': recorder.state if recorder is not None else 'off',
                 'recorder_written': str(recorder.written if recorder is not None else 0),
                 'recorder_dropped': str((recorder.dropped if recorder is not None else 0)
                                         + self._record_errors),
                 'recorder_error': recorder.error if recorder is not None else '',
                 'samples_dropped': str(sum(f.dropped for f in faults)),
                 'callback_errors': str(sum(f.callback_errors for f in faults))}
        stamp = self.port.now_ns()
        msg = build_status(self.port, self.port.node_name, out, stamp, extra, self.hardware_id)
        self._publish(self._pub_status, '~/status', msg)
        if active:
            self._publish(self._pub_rows, '~/rows',
                          build_rows(self.port, out.skill, rows, names, stamp, self.hardware_id))
        if self._status_count % self._diagnostics_every == 0:
            self._publish(self._pub_diagnostics, '/diagnostics', msg)
        self._status_count += 1

    # ------------------------------------------------------------- skills
    def _guarded(self, what: str, handler: Any) -> Any:
        """A Trigger handler whose exceptions become an error reply and a log line (on rclpy
        an exception escaping a service callback would end spin(), i.e. the node)."""
        def callback(request: Any, response: Any) -> Any:
            try:
                return handler(request, response)
            except Exception as exc:  # noqa: BLE001 - never an exit because of one request
                self.port.log('error', f'{what} failed; answered with an error reply:\n'
                              + traceback.format_exc())
                response.success, response.message = False, f'internal error: {exc!r}'
                return response
        return callback

    def _add_skill(self, name: str) -> None:
        """Declare a new (or re-added) skill's tunables, adopting launch values that are valid,
        and create its activation service."""
        loaded = self.library.get(name)
        assert loaded is not None
        declared = []
        for index, info in enumerate(loaded.compiled.params):
            value = self._declare_tunable(name, info)
            declared.append(info.name)
            if value != info.value:
                loaded.runner.solver.set_param(index, value)
        self._declared[name] = declared
        if name not in self._services:
            self._services[name] = self.port.create_service(
                self.port.types.Trigger, f'~/skills/{name}/activate',
                self._guarded(f'~/skills/{name}/activate', self._activate_callback(name)))

    def _declare_tunable(self, skill: str, info: Any, in_force: float | None = None) -> float:
        """Declare ``<skill>.<tunable>`` with its range and description; return the value in
        force. With ``in_force`` (a reload) that value is declared, any launch value ignored.
        Otherwise a launch value is adopted if valid; a refused one does not stay in the
        parameter: it is declared again with the file's value, and that is logged once.
        """
        name = f'{skill}.{info.name}'
        unit = f' [{info.unit}]' if info.unit else ''
        description = f'{info.description}{unit}'.strip() or f'tunable {info.name} of {skill}'
        value_range = (float(info.lower), float(info.upper))
        declare = self.port.declare_parameter
        self._declaring.add(name)
        try:
            if in_force is not None:
                self._undeclare(name)
                declare(name, float(in_force), description, value_range=value_range,
                        ignore_override=True)
                return float(in_force)
            try:
                got = declare(name, float(info.value), description,
                              value_range=value_range).value
                problem = (info.check(float(got)) if isinstance(got, float)
                           else f'{info.name} must be a double (write 1.0, not 1), got {got!r}')
            except TransportError as err:
                got, problem = None, str(err)
            if problem is None:
                if got != info.value:
                    self._user_set.add(name)
                return float(got)
            self._undeclare(name)
            declare(name, float(info.value), description, value_range=value_range,
                    ignore_override=True)
            self._param_problems.problem(
                name, 'launch value refused',
                f'{problem}; the value in force (and read back) is the file\'s {info.value}')
            return float(info.value)
        finally:
            self._declaring.discard(name)

    def _undeclare(self, name: str) -> None:
        try:
            self.port.undeclare_parameter(name)
        except TransportError:
            pass                         # not declared (or read-only: not one of ours)

    def _activate_callback(self, name: str) -> Any:
        def callback(request: Any, response: Any) -> Any:
            problem = self._cannot_activate(name)
            if problem:
                response.success, response.message = False, problem
                return response
            ok, message = self.loop.request_activation(name, timeout=self._switch_timeout)
            response.success, response.message = ok, message
            return response
        return callback

    def _on_hold(self, request: Any, response: Any) -> Any:
        """~/hold: the built-in hold from the next tick on; the reply comes after that tick."""
        response.success, response.message = self.loop.request_hold(self._switch_timeout)
        return response

    def _cannot_activate(self, name: str) -> str | None:
        if name == HOLD and self.configured:
            return None                  # the built-in hold is always available
        if not self.active:
            return (f'the controller is not active (lifecycle state: '
                    f'{"inactive" if self.configured else "unconfigured"}); activate it '
                    'first (ros2 lifecycle set <node> activate)')
        loaded = self.library.get(name)
        if loaded is None:
            return f'skill {name!r} is not loaded (loaded: {", ".join(self.library.names())})'
        unmapped = [i for i in loaded.compiled.input_names if i not in self.mappings]
        if unmapped:
            return (f'skill {name!r} reads inputs {unmapped} that no topic is mapped to '
                    '(parameters inputs.<input>.topic)')
        return None

    def _on_reload(self, request: Any, response: Any) -> Any:
        """Reload the skills folder off the control thread.

        Removed skills lose their parameters and service (the running one stays until another
        skill is active); new ones are declared; a changed file keeps every value set at run
        time that is still valid for it (others: the file's value, said in the reply), and if
        it is the running skill, the controller switches to the new version at a tick boundary
        and the reply says how (continued or restarted) or why not.
        """
        active = self.loop.active
        running = active.name if active is not None else None
        self._reload_values, self._reload_notes = {}, []
        report = self.library.reload(prepare=self._prepare_reloaded,
                                     keep=(running,) if running else ())
        report.notes.extend(self._reload_notes)
        ok = report.ok
        for name in report.removed:
            for param in self._declared.pop(name, []):
                self._undeclare(f'{name}.{param}')
                self._user_set.discard(f'{name}.{param}')
            handle = self._services.pop(name, None)
            if handle is not None:
                self.port.destroy_service(handle)
        for name in report.added:
            self._add_skill(name)
        for name in report.changed:
            values = self._reload_values.pop(name, None)
            if values is None:            # renamed in place: a new name for this node
                self._add_skill(name)
                continue
            for param in set(self._declared.get(name, [])) - set(values):
                self._undeclare(f'{name}.{param}')
                self._user_set.discard(f'{name}.{param}')
            loaded = self.library.get(name)
            assert loaded is not None
            for info in loaded.compiled.params:
                self._declare_tunable(name, info, in_force=values[info.name])
            self._declared[name] = list(values)
        if running is not None and running in report.changed:
            switched, message = self.loop.request_reload_switch(running, self._switch_timeout)
            report.notes.append(message)
            ok = ok and switched
        response.success = ok
        response.message = report.summary()
        for line in report.log_lines():   # one failed file per line
            self.port.log('info' if ok else 'warn', f'reload: {line}')
        return response

    def _prepare_reloaded(self, new: Any, old: Any) -> None:
        """Before a changed file becomes visible: give its runner the values in force.

        A value set at run time (or at launch) carries over when the reloaded file still
        accepts it; every other tunable takes the reloaded file's value.
        """
        if old is None:
            return
        skill = new.name
        values: dict[str, float] = {}
        for index, info in enumerate(new.compiled.params):
            name = f'{skill}.{info.name}'
            value = float(info.value)
            if name in self._user_set:
                try:
                    current = float(self.port.get_parameter(name).value)
                except (TransportError, TypeError, ValueError):
                    current = value
                problem = info.check(current)
                if problem is None:
                    value = current
                else:
                    self._user_set.discard(name)
                    self._reload_notes.append(f'{name}: the value set at run time is not valid '
                                              f'for the reloaded file ({problem}); the file\'s '
                                              f'{info.value} is in force')
            new.runner.solver.set_param(index, value)
            values[info.name] = value
        self._reload_values[skill] = values

    # ---------------------------------------------------------- parameters
    def _tunable(self, name: str) -> tuple[str, Any, str] | None:
        """(skill, its LoadedSkill, tunable) for a parameter '<skill>.<tunable>', else None."""
        skill, _, rest = name.partition('.')
        library = self.library
        loaded = library.get(skill) if rest and library is not None else None
        return (skill, loaded, rest) if loaded is not None else None

    def _not_settable(self, name: str) -> str:
        """Why a parameter that is not a run-time parameter of this node cannot be set."""
        if name in STARTUP_PARAMETERS or name.startswith('watchdog.'):
            return f'{name} is read at configure; set it while the node is unconfigured'
        if name.startswith('inputs.'):
            return (f'{name}: input topics are mapped at start-up only; restart the node to '
                    'change them')
        if name == 'use_sim_time':
            return ('use_sim_time cannot change at run time: the controller ticks on the '
                    'monotonic clock and does not follow simulated time')
        return (f'{name} has no effect on this node at run time (run-time parameters: '
                '<skill>.<tunable>, activate_skill, watchdog.reduced_mode)')

    def _validate_parameters(self, values: dict[str, Any]) -> tuple[bool, str]:
        """Check every value; then, if activate_skill is set, switch (with that skill's
        tunables from the same call) and answer with the outcome of its first tick: a failed
        switch rejects the whole call, so what is read back is what is in force."""
        target = None
        for name, value in values.items():
            if name in self._declaring:
                continue                  # declared by the node itself, checked there
            if name == 'activate_skill':
                if not isinstance(value, str):
                    return False, f'activate_skill must be a skill name, got {value!r}'
                if value:
                    problem = self._cannot_activate(value)
                    if problem:
                        return False, problem
                    target = value
                continue
            if name == 'watchdog.reduced_mode':
                if not isinstance(value, bool):
                    return False, f'{name} must be true or false, got {value!r}'
                continue
            if self._read_at_configure(name) and name in self._node_parameters:
                if self.configured:
                    return False, (f'{name} is read at configure: clean the node up first '
                                   '(ros2 lifecycle set <node> cleanup), set it, then '
                                   'configure again')
                continue                  # read by the next configure
            found = self._tunable(name)
            if found is None:
                return False, self._not_settable(name)
            skill, loaded, param = found
            try:
                info = loaded.compiled.params[loaded.compiled.param_index(param)]
            except KeyError:
                return False, f'skill {skill!r} has no tunable {param!r}'
            if not isinstance(value, float):
                return False, f'{name} must be a double (write 1.0, not 1), got {value!r}'
            problem = info.check(value)
            if problem:
                return False, f'{skill}.{problem}'
        if target is None:
            return True, ''
        prefix = f'{target}.'
        changes = {n[len(prefix):]: float(v) for n, v in values.items()
                   if n.startswith(prefix) and n not in self._declaring}
        ok, message = self.loop.request_activation(target, timeout=self._switch_timeout,
                                                   params=changes)
        self.port.log('info' if ok else 'warn', f'activate_skill {target}: {message}')
        if not ok:
            return False, f'activate_skill {target}: {message}'
        self._switched_with = {prefix + n for n in changes} | {'activate_skill'}
        return True, ''

    def _apply_parameters(self, values: dict[str, Any]) -> None:
        switched, self._switched_with = self._switched_with, set()
        per_skill: dict[str, dict[str, float]] = {}
        for name, value in values.items():
            if name in self._declaring or name == 'activate_skill':
                continue
            if name == 'watchdog.reduced_mode':
                if self.watchdog is not None:    # else read at the next configure
                    self.watchdog.set_reduced_mode(bool(value))
                continue
            found = self._tunable(name)
            if found is None:
                continue
            self._user_set.add(name)
            if name in switched:
                continue                  # already applied with the switch, in its tick
            skill, _, param = found
            per_skill.setdefault(skill, {})[param] = float(value)
        loop = self.loop
        for skill, changes in per_skill.items():
            if loop is not None:
                loop.set_parameters(skill, changes)
        if 'activate_skill' in switched and values.get('activate_skill'):
            # write-only: once the switch is done, reading it gives '' again
            ok, reason = self.port.set_parameter('activate_skill', '')
            if not ok:
                self.port.log('warn', f'activate_skill could not be cleared: {reason}')

    def stats(self) -> dict[str, Any]:
        """Measured on the node's monotonic clock: latency sample arrival -> command published
        (tick_on joint_states only), switch delays in ticks, ticks, missed timer periods."""
        n = min(self._latency_count, self._latency_ns.size)
        lat = self._latency_ns[:n] / 1000.0
        current = self.loop.switch_delays if self.loop is not None else []
        delays = np.array([*self._switch_delays, *current]) / getattr(self, 'dt', 1.0)
        pct = (lambda a, q: round(float(np.percentile(a, q)), 2)) if n else None
        return {
            'ticks': self._ticks, 'tick_errors': self._errors,
            'timer_missed': int(getattr(self.timer, 'missed', 0)),
            'latency_us': None if not n else {
                'samples': int(n), 'p50': pct(lat, 50), 'p90': pct(lat, 90),
                'p99': pct(lat, 99), 'max': round(float(lat.max()), 2)},
            'realtime': None if self.realtime is None else self.realtime.as_dict(),
            'switch_delay_ticks': None if not delays.size else {
                'count': int(delays.size), 'p50': round(float(np.median(delays)), 3),
                'max': round(float(delays.max()), 3)},
        }

    # ------------------------------------------------------------ shutdown
    def close(self) -> None:
        """After spin() returned (callbacks no longer run on either transport): the shutdown
        transition (zero commands, transition events) unless finalized already; the bag."""
        self._closing = True
        if self.configured:
            self.lifecycle.trigger('shutdown')
        recorder = self.recorder
        if recorder is not None:
            self.port.log('info', 'closing the bag')
            recorder.close()      # never raises: a failure is logged through on_failure
            if recorder.state == 'closed':
                self.port.log('info', f'bag {recorder.path} closed: {recorder.written} '
                              f'messages, {recorder.dropped + self._record_errors} dropped')


def record_folder_problem(path: Path) -> str | None:
    """Why --record PATH cannot become a new bag folder, checked at start (the bag itself is
    created by the first configure): it exists, or its nearest existing parent is not a
    writable folder."""
    if path.exists():
        return f'--record {path}: it exists already; give a new folder for the bag'
    parent = path.absolute().parent
    while not parent.exists():
        parent = parent.parent
    if not parent.is_dir():
        return f'--record {path}: cannot create the bag folder there ({parent} is not a folder)'
    if not os.access(parent, os.W_OK | os.X_OK):
        return f'--record {path}: cannot create the bag folder there ({parent} is not writable)'
    return None


def build_arg_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog='constraint-ctrl run',
                                     description='Start the controller node.')
    transport_options(parser)
    parser.add_argument('--record', type=Path, help='write a rosbag2 (MCAP) to this new folder')
    parser.add_argument('--stats', type=Path, help='write timing statistics (JSON) at exit')
    parser.add_argument('--autostart', action=argparse.BooleanOptionalAction, default=True,
                        help='configure and activate the node at start (default); with '
                             '--no-autostart it waits unconfigured for a lifecycle manager '
                             '(ros2 lifecycle set, a launch file\'s lifecycle events)')
    parser.add_argument('--realtime', type=int, metavar='PRIORITY',
                        help='run the control path (the threads that receive joint_states and '
                             'tick, and the transport receive threads) SCHED_FIFO at this '
                             'priority (1-99) and lock memory (mlockall), where permitted; '
                             'otherwise normal scheduling, said in the log')
    cfg = config_dir()
    ros_arguments(parser, f"""\
Parameters to start with (all of them: README, "The controller node"):
  skills_folder            default: {cfg / 'skills'} (loads every *.yaml in it)
  initial_skill            skill to activate once joint_states arrive (default: none)
  robot_description_file   default: {cfg / 'robots' / 'six_axis_arm.urdf'}
  inputs.*, people.sources skill inputs and person detectors -> topics; a complete example:
                           {cfg / 'controller.yaml'}

Your own skills against the simulated cell (a skill names its robot and offline scene relative
to its own file, so copy the whole folder):
  cp -r {cfg} my_cell
  constraint-ctrl sim & constraint-ctrl run --ros-args --params-file my_cell/controller.yaml -p skills_folder:=my_cell/skills -p initial_skill:=move_to_point
then drive it without ROS: constraint-ctrl call activate SKILL, constraint-ctrl param set
NAME VALUE, constraint-ctrl echo '~/events' (each has its --help).""")
    return parser


def run(argv: list[str]) -> int:
    ours, ros = split_ros_args(argv)
    parser = build_arg_parser()
    args = parser.parse_args(ours)
    # Threads of this process hand the interpreter lock over after at most 0.5 ms instead of
    # Python's 5 ms, so a sample that arrives while another thread (status, services) runs
    # Python code waits at most that long for its tick.
    sys.setswitchinterval(SWITCH_INTERVAL_S)
    if args.realtime is not None and check_priority(args.realtime):
        parser.error(check_priority(args.realtime))
    realtime = RealtimeControl(args.realtime) if args.realtime is not None else None
    problem = record_folder_problem(args.record) if args.record is not None else None
    if problem:
        raise ConstraintCtrlError(problem)
    from ..transport.port import open_port
    port = open_port(args.transport, NODE_NAME, ros, distro=args.distro, lifecycle=True)

    def build() -> ControllerNode:
        node = ControllerNode(port, record=args.record, realtime=realtime)
        if args.autostart:
            # a failed step leaves the node unconfigured (or inactive), serving the lifecycle
            # services, with the reason in the log: fix it and configure by hand
            if node.lifecycle.trigger('configure'):
                node.lifecycle.trigger('activate')
        return node
    node = serve(port, build)
    if node is not None and args.stats:
        args.stats.write_text(json.dumps(node.stats(), indent=2) + '\n')
    return 0


def main(argv: list[str] | None = None) -> int:
    """Entry point for `ros2 run constraint_ctrl controller_node` and launch files."""
    import sys
    from ..cli import report_errors
    return report_errors(run, list(sys.argv[1:] if argv is None else argv))


__all__ = ['ControllerNode', 'NODE_NAME', 'NODE_PARAMETER_GROUPS', 'main', 'run']
