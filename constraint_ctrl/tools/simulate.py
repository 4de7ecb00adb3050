"""`constraint-ctrl simulate`: lockstep kinematic simulation of one skill, no middleware.

Offline behaves like online: each tick runs the controller node's own ControlLoop
(runtime/loop.py: tunables and activation at the tick boundary, the skill's QP, then the
watchdog) with the very Watchdog the node builds (runtime/watchdog_setup.build_watchdog from the
robot's URDF and the node's watchdog settings: its defaults, or the ``watchdog.*``,
``people.timeout`` and ``rate_hz`` parameters of a node parameters file). So a skill that the
watchdog would cap on the robot (acceleration, position limits, joint speed, reduced speed and
separation near a person in the scene) is capped here too, and the report says which stage
capped what and for how long (tools/watchdog_stages.py).

The published command is integrated exactly (q += dt * q_dot), so what you see is the
controller's behaviour without robot dynamics or latency. Inputs come from the skill's
``offline.inputs`` constants, or from the simulated work cell when the skill names an
``offline.scene`` (then also the people in it); every sample is stamped with the tick's time.

Arguments are checked before any work: duration and tick finite and > 0, at most
``MAX_TICKS`` ticks, and at most ``MAX_TRACE_VALUES`` recorded numbers (the trace is kept in
memory for the plots); ``--out`` must not be an existing file. report.json is strict JSON
(RFC 8259): non-finite numbers (a NaN error, an infinite value) are written as null.
"""
from __future__ import annotations

import json
import math
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from collections.abc import Mapping

import numpy as np

from ..errors import ConstraintCtrlError
from ..model.kinematics import RobotModel
from ..runtime.library import LoadedSkill
from ..runtime.loop import ControlLoop, InputSample, Snapshot
from ..runtime.runner import SkillRunner
from ..runtime.watchdog_setup import DEFAULTS, build_watchdog, points_function
from ..safety.watchdog import PersonSample
from ..skill.compile import CompiledSkill, compile_skill
from ..skill.loader import load_skill
from ..skill.robot import robot_model
from .watchdog_stages import StageRecorder

#: The most ticks one run may have (the trace of every tick is kept in memory for the plots).
MAX_TICKS = 1_000_000
#: The most numbers the trace may hold (8 bytes each: 400 MB), checked once the skill's size is
#: known (joints, unknowns and rows per tick).
MAX_TRACE_VALUES = 50_000_000
#: The node's name in parameter files (nodes/controller_node.NODE_NAME; not imported, so this
#: tool never loads the node layer).
NODE_FQN = '/constraint_controller'
#: The node's default control rate (parameter rate_hz), Hz.
NODE_RATE_HZ = 500.0


class SimulateError(ConstraintCtrlError):
    """A bad argument of simulate (reported as one line, exit code 2)."""


def check_arguments(duration: float, dt: float, out_dir: Path | None = None) -> int:
    """The number of ticks of a run; refuses what cannot run (one-line SimulateError)."""
    if not (math.isfinite(duration) and duration > 0):
        msg = f'--duration must be a finite number > 0 (seconds), got {duration!r}'
        raise SimulateError(msg)
    if not (math.isfinite(dt) and dt > 0):
        msg = f'--tick must be a finite number > 0 (seconds), got {dt!r}'
        raise SimulateError(msg)
    ticks = duration / dt
    if ticks > MAX_TICKS:
        msg = (f'--duration {duration:g} s at --tick {dt:g} s is {ticks:,.0f} ticks; simulate '
               f'runs at most {MAX_TICKS:,} ticks (the trace is kept in memory): shorten '
               'the duration or lengthen the tick')
        raise SimulateError(msg)
    n = int(round(ticks))
    if n < 1:
        msg = f'--duration {duration:g} s is shorter than one tick of {dt:g} s'
        raise SimulateError(msg)
    if out_dir is not None and out_dir.exists() and not out_dir.is_dir():
        msg = f'--out {str(out_dir)!r} is a file; name a folder (new or existing)'
        raise SimulateError(msg)
    return n


@dataclass(slots=True)
class NodeSettings:
    """What the controller node would run the skill with."""

    rate_hz: float = NODE_RATE_HZ
    watchdog: dict[str, Any] = field(default_factory=dict)
    people_timeout: float = 0.2
    source: str = 'the node defaults (runtime/watchdog_setup.DEFAULTS, rate_hz 500)'


def node_settings(params_file: Path | None) -> NodeSettings:
    """Settings from a node parameters file (as given to the node), else the node defaults.

    Reads ``rate_hz``, ``people.timeout`` and every ``watchdog.*`` of the entries that apply to
    the node ``/constraint_controller`` (``/**`` included), later entries winning, as
    ``--params-file`` does for the node.
    """
    if params_file is None:
        return NodeSettings()
    from ..transport.ros_args import load_params_file, node_key_matches

    _bounded_yaml(params_file)
    try:
        table = load_params_file(params_file)
    except ConstraintCtrlError as err:
        raise SimulateError(str(err)) from None
    params: dict[str, Any] = {}
    for node_key, values in table.items():
        if node_key_matches(node_key, NODE_FQN):
            params.update(values)
    settings = NodeSettings(source=f'{params_file} (node {NODE_FQN})')
    for name, value in params.items():
        if name.startswith('watchdog.'):
            key = name.removeprefix('watchdog.')
            if key not in DEFAULTS:
                msg = (f'{params_file}: unknown parameter {name!r}; the watchdog settings are '
                       f'{", ".join(sorted(DEFAULTS))}')
                raise SimulateError(msg)
            settings.watchdog[key] = value
    for name, attr in (('rate_hz', 'rate_hz'), ('people.timeout', 'people_timeout')):
        if name in params:
            value = params[name]
            if isinstance(value, bool) or not isinstance(value, (int, float)) or \
                    not math.isfinite(value) or value <= 0:
                msg = f'{params_file}: parameter {name!r} must be a number > 0, got {value!r}'
                raise SimulateError(msg)
            setattr(settings, attr, float(value))
    return settings


def _bounded_yaml(path: Path) -> None:
    """Refuse a parameters file over the limits of our YAML formats before PyYAML expands it
    (located_yaml: 1,000,000 bytes, 100,000 values with aliases written out)."""
    import yaml

    from ..errors import LocatedError
    from ..located_yaml import CountingLoader, TooManyNodes, check_expansion, read_limited

    try:
        text = read_limited(path, LocatedError).decode('utf-8')
        loader = CountingLoader(text)
        try:
            root = loader.get_single_node()
        finally:
            loader.dispose()
        if root is not None:
            check_expansion(root, LocatedError, str(path))
    except LocatedError as err:
        raise SimulateError(str(err)) from None
    except TooManyNodes as err:
        raise SimulateError(f'{path}:{err.problem_mark.line + 1}: {err.problem}') from None
    except (yaml.YAMLError, UnicodeDecodeError, RecursionError):
        return                          # load_params_file reports what is wrong with it


@dataclass(slots=True)
class Trace:
    """Everything recorded per tick (rows x ticks arrays are filled in place).

    ``joint_velocity`` is the published command (after the watchdog), ``requested_velocity``
    the solver's (zero when it gave none); ``state`` and ``speed_scale`` are the watchdog's.
    """

    time: np.ndarray
    q: np.ndarray
    joint_velocity: np.ndarray
    requested_velocity: np.ndarray
    unknown_velocity: np.ndarray
    unknowns: np.ndarray
    error: np.ndarray
    slack: np.ndarray
    active: np.ndarray
    solve_us: np.ndarray
    speed_scale: np.ndarray
    status: list[str] = field(default_factory=list)
    state: list[str] = field(default_factory=list)
    events: list[tuple[float, str]] = field(default_factory=list)
    transitions: list[dict[str, Any]] = field(default_factory=list)
    watchdog: dict[str, Any] = field(default_factory=dict)


def trace_values_per_tick(skill: CompiledSkill) -> int:
    """Numbers the trace holds per tick (for MAX_TRACE_VALUES)."""
    return 4 * skill.n_q + 2 * skill.n_s + 3 * skill.n_rows + 2


def start_pose(skill: CompiledSkill) -> np.ndarray:
    start = skill.spec.offline.start
    unknown = sorted(set(start) - set(skill.joint_names))
    if unknown:
        raise skill.spec.error(f'unknown joints {unknown}; the robot has {list(skill.joint_names)}',
                               f'offline.start.{unknown[0]}')
    return np.array([float(start.get(j, 0.0)) for j in skill.joint_names])


class ExactPlant:
    """The command integrated exactly; inputs are the skill's offline.inputs constants."""

    def __init__(self, skill: CompiledSkill) -> None:
        values = skill.spec.offline.inputs
        missing = [name for name in skill.input_names if name not in values]
        if missing:
            raise skill.spec.error(f'no offline value for inputs {missing}: give them under '
                                   'offline.inputs or name an offline.scene', 'offline')
        self.u = np.array([float(values[name]) for name in skill.input_names])
        self.q = start_pose(skill)

    def measured(self) -> tuple[np.ndarray, np.ndarray]:
        return self.q, self.u

    def true_q(self) -> np.ndarray:
        return self.q

    def apply(self, dt: float, qdot: np.ndarray) -> None:
        self.q = self.q + dt * qdot

    def people(self) -> list[tuple[str, np.ndarray]]:
        return []


class ScenePlant:
    """The simulated work cell: latency, noise, sensors and contact (constraint_ctrl.sim)."""

    def __init__(self, skill: CompiledSkill) -> None:
        from ..sim.scene import load_scene
        from ..sim.signals import world_signals
        from ..sim.world import World

        scene_path = skill.spec.offline.scene
        assert scene_path is not None
        self.world = World(load_scene(scene_path), skill.model)
        if skill.spec.offline.start:
            self.world.reset_joint_positions(start_pose(skill))
        self._signals = world_signals
        offered = world_signals(self.world)
        missing = [n for n in skill.input_names if n not in offered]
        if missing:
            raise skill.spec.error(f'the scene {scene_path.name} offers no signals {missing}; '
                                   f'it offers {sorted(offered)}', 'offline.scene')
        self.names = skill.input_names
        order = [skill.model.joint_names.index(j) for j in skill.joint_names]
        self.order = np.array(order, dtype=int)

    def measured(self) -> tuple[np.ndarray, np.ndarray]:
        signals = self._signals(self.world)
        return (self.world.joint_positions[self.order],
                np.array([signals[name] for name in self.names]))

    def true_q(self) -> np.ndarray:
        return self.world.true_joint_positions[self.order]

    def apply(self, dt: float, qdot: np.ndarray) -> None:
        command = np.zeros(len(self.order))
        command[self.order] = qdot
        self.world.step(dt, command)

    def people(self) -> list[tuple[str, np.ndarray]]:
        """(name, position in the base frame) of each person in the scene."""
        return self.world.people()


class _OneSkill:
    """The skill library of the ControlLoop, holding just the simulated skill."""

    def __init__(self, loaded: LoadedSkill) -> None:
        self.loaded = loaded

    def get(self, name: str) -> LoadedSkill | None:
        return self.loaded if name == self.loaded.name else None


def run(skill: CompiledSkill, duration: float, dt: float = 0.002, *,
        progress: bool = False, settings: NodeSettings | None = None,
        qp_solver: str = 'quadprog') -> Trace:
    """Run the skill through the node's ControlLoop and watchdog for ``duration`` seconds."""
    settings = settings or NodeSettings()
    n = check_arguments(duration, dt)
    plant = ScenePlant(skill) if skill.spec.offline.scene is not None else ExactPlant(skill)
    # The node's model: its URDF in the URDF's root frame, as the node loads it.
    model = RobotModel(skill.model.description)
    sources = [name for name, _ in plant.people()]
    watchdog = build_watchdog(model, dt, settings.watchdog,
                              {source: settings.people_timeout for source in sources})
    _, points_fn = points_function(model, settings.watchdog)
    stages = StageRecorder(watchdog, points_fn, tuple(model.joint_names))
    loaded = LoadedSkill(path=Path(skill.spec.source), digest='', compiled=skill,
                         runner=SkillRunner(skill, qp_solver))
    loop = ControlLoop(_OneSkill(loaded), watchdog, dt,  # type: ignore[arg-type]
                       person_sources=sources)
    loop.request_activation(skill.spec.name)
    rows = skill.n_rows
    trace = Trace(time=np.arange(n) * dt, q=np.zeros((n, skill.n_q)),
                  joint_velocity=np.zeros((n, skill.n_q)),
                  requested_velocity=np.zeros((n, skill.n_q)),
                  unknown_velocity=np.zeros((n, skill.n_s)), unknowns=np.zeros((n, skill.n_s)),
                  error=np.full((n, rows), np.nan), slack=np.full((n, rows), np.nan),
                  active=np.zeros((n, rows), dtype=bool), solve_us=np.zeros(n),
                  speed_scale=np.zeros(n))
    bar = _progress(n) if progress and n >= 5000 else None
    with np.errstate(invalid='ignore', over='ignore'):   # non-finite rows show in the statuses
        for k in range(n):
            _tick(k, k * dt, plant, loop, skill, trace, stages)
            if bar is not None and k % 500 == 0:
                bar.update(min(500, n - k))
    if bar is not None:
        bar.close()
    trace.watchdog = stages.summary()
    trace.watchdog['settings'] = settings.source
    trace.watchdog['transitions'] = trace.transitions
    return trace


def _tick(k: int, t: float, plant: ExactPlant | ScenePlant, loop: ControlLoop,
          skill: CompiledSkill, trace: Trace, stages: StageRecorder) -> None:
    """One tick: the plant's measurements -> the node's loop -> the plant; record it all."""
    q, u = plant.measured()
    q = np.array(q, dtype=float)
    snap = Snapshot(
        now=t, q=q, joint_state_stamp=t,
        inputs={name: InputSample(float(value), t)
                for name, value in zip(skill.input_names, u)},
        people={name: PersonSample(name, np.asarray(position, dtype=float), t)
                for name, position in plant.people()})
    out = loop.step(snap)
    tick = out.tick
    runner = loop.active
    trace.q[k] = plant.true_q()
    trace.joint_velocity[k] = out.command
    trace.speed_scale[k] = out.watchdog.speed_scale
    trace.state.append(out.watchdog.state.value)
    if runner is not None:
        trace.unknowns[k] = runner.unknowns
    if tick is not None:
        trace.requested_velocity[k] = tick.joint_velocity
        trace.unknown_velocity[k] = tick.unknown_velocity
        trace.solve_us[k] = (tick.eval_ns + tick.solve_ns) / 1000.0
        trace.status.append(tick.status.value)
        trace.events.extend((t, name) for name in tick.events)
        report = runner.diagnostics() if runner is not None else None
        if report is not None:
            trace.error[k] = report.error
            trace.slack[k] = report.slack
            trace.active[k] = report.active
    else:
        trace.status.append('no tick: ' + (out.watchdog.reason or 'no skill'))
    for tr in out.watchdog.transitions:
        trace.transitions.append({'time_s': round(t, 6), 'from': tr.from_state.value,
                                  'to': tr.to_state.value, 'reason': tr.reason})
    stages.record(t, q, tick.joint_velocity if tick is not None and tick.ok else None,
                  out.watchdog)
    plant.apply(loop.dt, out.command)


def _progress(total: int):  # pragma: no cover - cosmetic
    from tqdm import tqdm
    return tqdm(total=total, unit='tick', file=sys.stderr, leave=False)


def summarise(skill: CompiledSkill, trace: Trace, duration: float, dt: float) -> dict[str, object]:
    per_constraint: dict[str, dict[str, object]] = {}
    for con in skill.spec.constraints:
        idx = [i for i, r in enumerate(skill.rows) if r.constraint == con.name]
        err = np.abs(trace.error[:, idx]) if idx else np.zeros((1, 1))
        slack = np.abs(trace.slack[:, idx]) if idx else np.zeros((1, 1))
        per_constraint[con.name] = {
            'kind': con.kind, 'hard': con.hard, 'priority': con.priority,
            'final_error': _max(err[-1]),
            'max_error_last_10_percent': _max(err[-max(1, len(err) // 10):]),
            'max_slack': _max(slack),
            'active_fraction': float(trace.active[:, idx].mean()) if idx else 0.0,
        }
    statuses = {s: trace.status.count(s) for s in sorted(set(trace.status))}
    us = trace.solve_us[trace.solve_us > 0]
    published = np.abs(trace.joint_velocity).max(axis=0) if len(trace.time) else \
        np.zeros(skill.n_q)
    requested = np.abs(trace.requested_velocity).max(axis=0) if len(trace.time) else \
        np.zeros(skill.n_q)
    return {
        'skill': skill.spec.name,
        'source': skill.spec.source,
        'duration_s': duration,
        'tick_s': dt,
        'ticks': len(trace.time),
        'non_finite_numbers': 'written as null',
        'constraints': per_constraint,
        'events': [{'time_s': round(t, 6), 'event': name} for t, name in trace.events],
        'solve_status_counts': statuses,
        'solve_time_us': {
            'median': float(np.median(us)) if us.size else None,
            'p99': float(np.percentile(us, 99)) if us.size else None,
            'max': float(us.max()) if us.size else None,
            'note': 'evaluate + solve per tick, wall clock on this machine',
        },
        'watchdog': trace.watchdog,
        'seconds_in_state': {state: round(trace.state.count(state) * dt, 6)
                             for state in ('normal', 'reduced', 'stopping', 'stopped')},
        'max_joint_speed': {
            'published': dict(zip(skill.joint_names, published.tolist())),
            'requested_by_the_solver': dict(zip(skill.joint_names, requested.tolist())),
        },
        'final_joint_positions': dict(zip(skill.joint_names, trace.q[-1].tolist())),
        'final_unknowns': dict(zip(skill.unknown_names, trace.unknowns[-1].tolist())),
    }


def _max(values: np.ndarray) -> float:
    """Largest value; NaN if any value is NaN (a row that was not finite stays visible)."""
    return float(np.max(values)) if values.size else 0.0


def strict_json(value: Any) -> Any:
    """``value`` with every non-finite float replaced by None (RFC 8259 has no NaN/Infinity)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, Mapping):
        return {str(k): strict_json(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [strict_json(v) for v in value]
    if isinstance(value, np.generic):
        return strict_json(value.item())
    return value


def write_outputs(skill: CompiledSkill, trace: Trace, summary: dict[str, object],
                  out_dir: Path) -> list[Path]:
    from .plots import plot_simulation

    try:
        out_dir.mkdir(parents=True, exist_ok=True)
        report = out_dir / 'report.json'
        report.write_text(json.dumps(strict_json(summary), indent=2, allow_nan=False) + '\n')
    except OSError as err:
        msg = f'cannot write to --out {str(out_dir)!r}: {err.strerror or err}'
        raise SimulateError(msg) from None
    return [report, *plot_simulation(skill, trace, out_dir)]


def simulate_file(path: Path, duration: float, out_dir: Path, dt: float | None = None,
                  progress: bool = True, params_file: Path | None = None,
                  qp_solver: str = 'quadprog', robot: Path | None = None
                  ) -> tuple[dict[str, object], list[Path]]:
    """Check the arguments, load, run and write report.json and the plots into ``out_dir``.

    ``dt`` None: the node's tick, 1 / rate_hz (500 Hz, or the parameters file's rate_hz).
    ``robot``: URDF for a skill without ``robot:`` (simulate --robot FILE).
    """
    settings = node_settings(params_file)
    dt = 1.0 / settings.rate_hz if dt is None else dt
    n = check_arguments(duration, dt, out_dir)
    spec = load_skill(path)
    skill = compile_skill(spec, robot_model(
        spec, RobotModel.from_urdf(robot) if robot is not None and spec.robot is None
        else None))
    values = n * trace_values_per_tick(skill)
    if values > MAX_TRACE_VALUES:
        msg = (f'{n:,} ticks of this skill ({trace_values_per_tick(skill)} numbers each) would '
               f'record {values:,} numbers; simulate records at most {MAX_TRACE_VALUES:,}: '
               'shorten --duration or lengthen --tick')
        raise SimulateError(msg)
    trace = run(skill, duration, dt, progress=progress, settings=settings, qp_solver=qp_solver)
    summary = summarise(skill, trace, duration, dt)
    return summary, write_outputs(skill, trace, summary, out_dir)


__all__ = ['MAX_TICKS', 'MAX_TRACE_VALUES', 'NodeSettings', 'SimulateError', 'Trace',
           'check_arguments', 'node_settings', 'run', 'simulate_file', 'start_pose',
           'strict_json', 'summarise']
