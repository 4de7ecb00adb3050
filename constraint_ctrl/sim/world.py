"""The simulated cell: a kinematic robot driven by joint velocity commands, plus its sensors.

The fixtures are those the scene names (each optional): the flange with the distance sensors,
the splined shaft (gear contact), a screw in a threaded hole, a curved panel. The wrist
force-torque reading is the sum of what each fixture exerts on the tool.

The robot follows the commanded velocities exactly (no dynamics) after a fixed transport
latency, clipped to the joint velocity limits and stopped at the position limits. Time advances
in fixed steps of 1/rate; ``step(dt, ...)`` runs as many whole steps as ``dt`` covers and carries
the remainder over. Measurement noise is drawn once per ``step`` call, in a fixed order, from one
seeded numpy Generator, so a run is reproducible whatever is read in between.
"""
from __future__ import annotations

import math
from collections import deque
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, NamedTuple

import numpy as np

from ..errors import ConstraintCtrlError
from .flange import FlangeSurface
from .gear_contact import GearContact, GearContactResult, GearPhase
from .operator import Operator
from .panel_contact import PanelContact, PanelResult
from .scene import Scene
from .screw_joint import ScrewJoint, ScrewResult

if TYPE_CHECKING:
    from ..model.kinematics import RobotModel


class SimError(ConstraintCtrlError):
    """The simulator was driven wrongly (e.g. a command of the wrong length)."""


class RangeReading(NamedTuple):
    """One distance sensor, in sensor_msgs/Range terms (m); +inf = no detection."""

    name: str
    range: float
    min_range: float
    max_range: float


@dataclass(frozen=True, slots=True)
class StepReport:
    """What the robot did with the commands during one ``step`` call."""

    steps: int  # fixed integration steps taken
    velocity_clipped: tuple[str, ...]  # joints whose command exceeded the velocity limit
    position_stopped: tuple[str, ...]  # joints held at a position limit
    rejected_commands: int  # non-finite commands replaced by zero velocity


@dataclass(frozen=True, slots=True)
class GearState:
    """Progress of the gear onto the shaft."""

    seated: bool
    depth: float  # m below the shaft top
    time_seated: float | None  # s
    phase: GearPhase
    mismatch: float  # rad, spline angle mismatch


class _Kinematics:
    """Forward kinematics of the frames the simulator needs, evaluated in place via a buffer."""

    def __init__(self, model: RobotModel, frames: Sequence[str]) -> None:
        function = model.fk_function(list(frames))
        self._q = np.zeros(model.n_joints)
        # casadi writes dense results column-major; the F-order views read them as 4x4
        self._flat = [np.zeros(16) for _ in frames]
        self.poses = [flat.reshape((4, 4), order='F') for flat in self._flat]
        self._buffer, self._trigger = function.buffer()
        self._buffer.set_arg(0, memoryview(self._q))
        for i, flat in enumerate(self._flat):
            if function.sparsity_out(i).nnz() != 16:
                msg = f'fk output {i} is not a dense 4x4; cannot evaluate it in place'
                raise SimError(msg)
            self._buffer.set_res(i, memoryview(flat))

    def evaluate(self, q: np.ndarray) -> list[np.ndarray]:
        self._q[:] = q
        self._trigger()
        return self.poses


class World:
    """Robot, fixtures (flange, shaft, screw, panel) and operator of one scene; advanced by
    ``step``. A fixture the scene does not name is None."""

    def __init__(self, scene: Scene, model: RobotModel) -> None:
        self.scene = scene
        self.model = model
        self.joint_names: tuple[str, ...] = tuple(model.joint_names)
        self.step_size = 1.0 / scene.rate
        self.flange = FlangeSurface(scene.flange) if scene.flange is not None else None
        self.contact = GearContact(scene.shaft) if scene.shaft is not None else None
        self.screw = ScrewJoint(scene.screw) if scene.screw is not None else None
        self.panel = PanelContact(scene.panel) if scene.panel is not None else None
        self.operator = Operator(scene.operator) if scene.operator is not None else None
        self._rng = np.random.default_rng(scene.seed)
        self._range_frames: tuple[str, ...] = (
            scene.range_sensors.frames if scene.range_sensors is not None else ())
        frames = {'robot.tool_frame': scene.tool_frame}
        frames.update({f'range_sensors.frames[{i}]': name
                       for i, name in enumerate(self._range_frames)})
        for field_path, name in frames.items():
            if name not in model.link_names:
                msg = f'the robot has no link {name!r} (URDF {str(scene.urdf)!r})'
                raise scene.error(msg, field_path)
        self._kin = _Kinematics(model, list(frames.values()))

        q0 = np.zeros(model.n_joints)
        for name, value in scene.initial_positions.items():
            field = f'robot.initial_positions.{name}'
            if name not in self.joint_names:
                msg = f'unknown joint {name!r}; the robot has {", ".join(self.joint_names)}'
                raise scene.error(msg, field)
            i = self.joint_names.index(name)
            if not model.lower[i] <= value <= model.upper[i]:
                msg = (f'{value:g} is outside the joint limits [{model.lower[i]:g}, '
                       f'{model.upper[i]:g}]')
                raise scene.error(msg, field)
            q0[i] = value
        self._q = q0
        self._qdot = np.zeros(model.n_joints)
        self._steps = 0
        self._carry = 0.0
        # (time the command takes effect, command); the last applied command stays in force
        self._pending: deque[tuple[float, np.ndarray]] = deque()
        self._applied = np.zeros(model.n_joints)
        self._contact: GearContactResult | None = None
        self._screw: ScrewResult | None = None
        self._panel: PanelResult | None = None
        self._evaluate_contact()
        self._sample_noise()

    def reset_joint_positions(self, q: Sequence[float] | np.ndarray) -> None:
        """Place the robot at rest at ``q`` (model joint order) before a run; drops pending
        commands. The screw and the panel start afresh (the screw standing out, its bit angle
        tracked from ``q``, so the jump to ``q`` does not count as turning)."""
        q = np.asarray(q, dtype=float)
        if q.shape != (self.model.n_joints,) or not np.isfinite(q).all():
            msg = f'expected {self.model.n_joints} finite joint positions, got {q!r}'
            raise SimError(msg)
        self._q = np.clip(q, self.model.lower, self.model.upper)
        self._qdot = np.zeros(self.model.n_joints)
        self._pending.clear()
        self._applied = np.zeros(self.model.n_joints)
        for fixture in (self.screw, self.panel):
            if fixture is not None:
                fixture.reset()
        self._evaluate_contact()

    # -- time ---------------------------------------------------------------------------------

    @property
    def time(self) -> float:
        """Simulation time (s): whole fixed steps taken times the step size."""
        return self._steps * self.step_size

    def step(self, dt: float, qdot_command: Sequence[float] | np.ndarray) -> StepReport:
        """Accept a joint velocity command (rad/s, model joint order) now and advance ``dt``.

        The command takes effect ``command_latency`` later and stays in force until a newer one
        does. A non-finite command is replaced by zero velocity and counted in the report.
        """
        command = np.array(qdot_command, dtype=float).reshape(-1)
        if command.shape != (self.model.n_joints,):
            msg = (f'velocity command has {command.size} values; the robot has '
                   f'{self.model.n_joints} joints ({", ".join(self.joint_names)})')
            raise SimError(msg)
        if not math.isfinite(dt) or dt < 0.0:
            raise SimError(f'step dt must be a finite number >= 0, got {dt!r}')
        rejected = 0
        if not np.all(np.isfinite(command)):
            command = np.zeros_like(command)
            rejected = 1
        self._pending.append((self.time + self.scene.command_latency, command))

        self._carry += dt
        n = int(math.floor(self._carry / self.step_size + 1e-9))
        self._carry = max(0.0, self._carry - n * self.step_size)
        clipped = np.zeros(self.model.n_joints, dtype=bool)
        stopped = np.zeros(self.model.n_joints, dtype=bool)
        for _ in range(n):
            self._advance(clipped, stopped)
        self._sample_noise()
        names = self.joint_names
        return StepReport(n, tuple(names[i] for i in np.nonzero(clipped)[0]),
                          tuple(names[i] for i in np.nonzero(stopped)[0]), rejected)

    def _advance(self, clipped: np.ndarray, stopped: np.ndarray) -> None:
        """One fixed step: pick the command in force, clip, integrate, update contacts."""
        now = self.time
        eps = 1e-9 * self.step_size
        while self._pending and self._pending[0][0] <= now + eps:
            self._applied = self._pending.popleft()[1]
        limit = self.model.velocity_limit
        qdot = np.clip(self._applied, -limit, limit)
        clipped |= qdot != self._applied
        q = self._q + qdot * self.step_size
        q_held = np.clip(q, self.model.lower, self.model.upper)
        held = q_held != q
        stopped |= held
        qdot = np.where(held, (q_held - self._q) / self.step_size, qdot)
        self._q = q_held
        self._qdot = qdot
        self._steps += 1
        self._evaluate_contact()

    def _evaluate_contact(self) -> None:
        """Update every fixture (and the operator's start trigger) for the current pose."""
        poses = self._kin.evaluate(self._q)
        tool = poses[0]
        position, rotation = tool[:3, 3], tool[:3, :3]
        if self.contact is not None:
            self._contact = self.contact.update(self.time, position, rotation)
        if self.screw is not None:
            self._screw = self.screw.update(self.time, position, rotation)
        if self.panel is not None:
            self._panel = self.panel.update(self.time, position, rotation)
        if self.operator is not None:
            self.operator.update(self.time, position)

    def _sample_noise(self) -> None:
        """Fixed draw order: joints, ranges, force, torque (zero sigma still draws)."""
        noise = self.scene.noise
        n_range = len(self._range_frames)
        self._joint_noise = noise.joint_position * self._rng.standard_normal(self.model.n_joints)
        self._range_noise = noise.range * self._rng.standard_normal(n_range)
        self._force_noise = noise.force * self._rng.standard_normal(3)
        self._torque_noise = noise.torque * self._rng.standard_normal(3)

    # -- state and measurements ---------------------------------------------------------------

    @property
    def true_joint_positions(self) -> np.ndarray:
        """Exact joint positions (rad), model joint order; a copy."""
        return self._q.copy()

    @property
    def joint_positions(self) -> np.ndarray:
        """Measured joint positions (rad) as an encoder would report them (with noise)."""
        return self._q + self._joint_noise

    @property
    def joint_velocities(self) -> np.ndarray:
        """Joint velocities (rad/s) applied during the last fixed step (after limits)."""
        return self._qdot.copy()

    def frame_poses(self) -> dict[str, np.ndarray]:
        """Exact 4x4 poses (base frame) of the tool frame and each range sensor frame."""
        frames = [self.scene.tool_frame, *self._range_frames]
        return {name: pose.copy() for name, pose in zip(frames, self._kin.evaluate(self._q))}

    def range_readings(self) -> list[RangeReading]:
        """Each sensor's distance along its frame's +x axis to the flange (noisy).

        Following the sensor_msgs/Range convention, a value outside [min_range, max_range]
        (nothing hit, or too close) is reported as +inf, meaning "no detection". A scene
        without distance sensors has none.
        """
        spec = self.scene.range_sensors
        if spec is None or self.flange is None:
            return []
        poses = self._kin.evaluate(self._q)[1:]
        origins = np.array([pose[:3, 3] for pose in poses])
        beams = np.array([pose[:3, 0] for pose in poses])
        exact = np.atleast_1d(self.flange.ray_cast(origins, beams, spec.max_range))
        readings = []
        for name, distance, noise in zip(spec.frames, exact, self._range_noise):
            value = distance + noise
            if not spec.min_range <= value <= spec.max_range:
                value = math.inf
            readings.append(RangeReading(name, float(value), spec.min_range, spec.max_range))
        return readings

    def wrench(self) -> tuple[np.ndarray, np.ndarray]:
        """(force N, torque N m) the environment exerts on the tool, tool frame, with noise:
        the sum over the scene's fixtures (zero, plus noise, when it has none)."""
        parts = [r for r in (self._contact, self._screw, self._panel) if r is not None]
        if not parts:
            return self._force_noise.copy(), self._torque_noise.copy()
        force, torque = parts[0].force, parts[0].torque
        for part in parts[1:]:
            force = force + part.force
            torque = torque + part.torque
        return force + self._force_noise, torque + self._torque_noise

    def people(self) -> list[tuple[str, np.ndarray]]:
        """(name, torso point in the base frame) of each person in the scene."""
        if self.operator is None:
            return []
        return [(self.operator.name, self.operator.position(self.time))]

    @property
    def gear_state(self) -> GearState:
        """Progress of the gear onto the shaft (a scene without a shaft has none: SimError)."""
        c = self._contact
        if c is None or self.contact is None:
            raise SimError('the scene has no shaft, so no gear state')
        return GearState(c.seated, c.depth, self.contact.time_seated, c.phase, c.mismatch)

    @property
    def screw_state(self) -> ScrewResult | None:
        """The screw's last evaluation (exact, no noise); None without a screw."""
        return self._screw

    @property
    def panel_state(self) -> PanelResult | None:
        """The panel contact's last evaluation (exact, no noise); None without a panel."""
        return self._panel
