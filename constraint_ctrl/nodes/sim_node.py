"""`constraint-ctrl sim`: the simulated work cell as a ROS 2 node (rclpy or direct DDS).

It integrates the velocity commands it receives at the scene's rate (with the scene's latency
and noise) and publishes what a real cell's drivers would:

- /joint_states (sensor_msgs/JointState) every step;
- /tool/range_left, /tool/range_right, /tool/range_front (sensor_msgs/Range; +inf when the
  surface is out of range, per the message's convention) at range_rate_hz;
- /tool/wrench (geometry_msgs/WrenchStamped, tool frame, force on the tool) at wrench_rate_hz;
- /cell/operator (geometry_msgs/PointStamped, base_link) at people_rate_hz.

With --publish-clock it also publishes the simulated time on /clock (rosgraph_msgs/Clock, from
0 at start, every step, before that step's messages) and stamps its headers with it, so nodes
with use_sim_time true run on the simulation's time.

Commands are read from command_topic (std_msgs/Float64MultiArray in the order of joint_names).
With --log FILE the true state (not the noisy measurements) is saved as a NumPy .npz at exit
for evaluation: time, joint positions, tool pose, true sensor ranges and tool stand-off, gear
state and operator position.
"""
from __future__ import annotations

import argparse
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import ConstraintCtrlError
from ..model.kinematics import RobotModel
from ..sim.scene import load_scene
from ..sim.world import World
from .common import config_dir, ros_arguments, serve, split_ros_args, transport_options

NODE_NAME = 'cell_simulator'
RANGE_FRAMES = ('range_left', 'range_right', 'range_front')


class TruthLog:
    """True state at a fixed rate, kept in memory and written once as .npz."""

    def __init__(self, path: Path, world: World, rate_hz: float) -> None:
        self.path = path
        self.world = world
        self.every = 1.0 / rate_hz
        self.next = 0.0
        self.rows: dict[str, list[Any]] = {k: [] for k in (
            'time', 'wall_time', 'q', 'tool_position', 'tool_axis', 'true_ranges', 'tool_standoff',
            'seated', 'gear_depth', 'operator', 'command')}

    def sample(self, command: np.ndarray) -> None:
        w = self.world
        if w.time + 1e-9 < self.next:
            return
        self.next = w.time + self.every
        poses = w.frame_poses()
        tool = poses[w.scene.tool_frame]
        spec = w.scene.range_sensors
        origins = np.array([poses[f][:3, 3] for f in spec.frames])
        beams = np.array([poses[f][:3, 0] for f in spec.frames])
        ranges = np.atleast_1d(w.flange.ray_cast(origins, beams, 1.0))
        standoff = float(np.atleast_1d(w.flange.ray_cast(tool[:3, 3], tool[:3, 2], 1.0))[0])
        people = w.people()
        r = self.rows
        r['time'].append(w.time)
        r['wall_time'].append(time.time())
        r['q'].append(w.true_joint_positions)
        r['tool_position'].append(tool[:3, 3].copy())
        r['tool_axis'].append(tool[:3, 2].copy())
        r['true_ranges'].append(ranges)
        r['tool_standoff'].append(standoff)
        gear = w.gear_state
        r['seated'].append(bool(gear.seated))
        r['gear_depth'].append(float(gear.depth))
        r['operator'].append(people[0][1] if people else np.full(3, np.nan))
        r['command'].append(command.copy())

    def write(self) -> None:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        np.savez_compressed(self.path, **{k: np.asarray(v) for k, v in self.rows.items()},
                            sensor_min=self.world.scene.range_sensors.min_range,
                            sensor_max=self.world.scene.range_sensors.max_range)


class SimNode:
    def __init__(self, port: Any, log: Path | None = None, publish_clock: bool = False) -> None:
        self.port = port
        t = port.types
        declare = port.declare_parameter
        cfg = config_dir()
        scene_file = Path(str(declare('scene_file', str(cfg / 'scenes' / 'gearbox_cell.yaml'),
                                      'scene YAML', read_only=True).value))
        self.scene = load_scene(scene_file)
        self.model = RobotModel.from_urdf(self.scene.urdf)
        self.world = World(self.scene, self.model)
        names = list(declare('joint_names', list(self.model.joint_names),
                             'joint order of the command', read_only=True).value)
        if sorted(names) != sorted(self.model.joint_names):
            msg = f'joint_names {names} must list the joints {list(self.model.joint_names)}'
            raise ConstraintCtrlError(msg)
        self.order = np.array([self.model.joint_names.index(j) for j in names])
        self.joint_names = names
        self.range_every = self._every(float(declare('range_rate_hz', 100.0, 'Hz').value))
        self.wrench_every = self._every(float(declare('wrench_rate_hz', 500.0, 'Hz').value))
        self.people_every = self._every(float(declare('people_rate_hz', 30.0, 'Hz').value))
        command_topic = str(declare('command_topic', '/constraint_controller/command',
                                    'Float64MultiArray velocity commands').value)
        self._lock = threading.Lock()
        self._command = np.zeros(self.model.n_joints)
        self._steps = 0
        self._last = None
        self.log = TruthLog(log, self.world, 100.0) if log is not None else None
        self.pub_joints = port.create_publisher(t.JointState, '/joint_states', 'sensor')
        self.pub_ranges = [port.create_publisher(t.Range, f'/tool/{name}', 'sensor')
                           for name in RANGE_FRAMES]
        self.pub_wrench = port.create_publisher(t.WrenchStamped, '/tool/wrench', 'sensor')
        self.pub_person = port.create_publisher(t.PointStamped, '/cell/operator', 'sensor')
        self.pub_clock = (port.create_publisher(t.Clock, '/clock', 'default') if publish_clock
                          else None)
        port.create_subscription(t.Float64MultiArray, command_topic, self._on_command,
                                 'default')
        self.timer = port.create_timer(1.0 / self.scene.rate, self._on_step)
        port.log('info', f'{NODE_NAME} ready: scene {scene_file.name}, {self.scene.rate:g} Hz, '
                 f'latency {self.scene.command_latency * 1000:.1f} ms')

    def _every(self, rate_hz: float) -> int:
        return max(1, round(self.scene.rate / rate_hz))

    def _on_command(self, msg: Any) -> None:
        data = np.asarray(list(msg.data), dtype=float)
        if data.shape != (len(self.order),):
            return
        command = np.zeros(self.model.n_joints)
        command[self.order] = data
        with self._lock:
            self._command = command

    def _sim_ns(self) -> int:
        return round(self.world.time * 1e9)

    def _header(self, frame: str) -> Any:
        t = self.port.types
        ns = self._sim_ns() if self.pub_clock is not None else self.port.now_ns()
        return t.Header(stamp=t.Time(sec=ns // 1_000_000_000, nanosec=ns % 1_000_000_000),
                        frame_id=frame)

    def _on_step(self) -> None:
        now = time.monotonic()
        dt = self.world.step_size if self._last is None else min(now - self._last, 0.05)
        self._last = now
        with self._lock:
            command = self._command.copy()
        self.world.step(dt, command)
        if self.log is not None:
            self.log.sample(command)
        self._steps += 1
        t = self.port.types
        if self.pub_clock is not None:
            ns = self._sim_ns()
            self.pub_clock.publish(t.Clock(clock=t.Time(sec=ns // 1_000_000_000,
                                                        nanosec=ns % 1_000_000_000)))
        q = self.world.joint_positions
        self.pub_joints.publish(t.JointState(
            header=self._header('base_link'), name=self.joint_names,
            position=q[self.order].tolist(),
            velocity=self.world.joint_velocities[self.order].tolist(), effort=[]))
        if self._steps % self.range_every == 0:
            spec = self.scene.range_sensors
            fov = float(spec.field_of_view)
            for pub, reading in zip(self.pub_ranges, self.world.range_readings()):
                pub.publish(t.Range(header=self._header(reading.name), radiation_type=1,
                                    field_of_view=fov, min_range=reading.min_range,
                                    max_range=reading.max_range, range=reading.range,
                                    **({'variance': 0.0} if self.port.distro != 'humble'
                                       else {})))
        if self._steps % self.wrench_every == 0:
            force, torque = self.world.wrench()
            self.pub_wrench.publish(t.WrenchStamped(
                header=self._header(self.scene.tool_frame),
                wrench=t.Wrench(force=t.Vector3(x=force[0], y=force[1], z=force[2]),
                                torque=t.Vector3(x=torque[0], y=torque[1], z=torque[2]))))
        if self._steps % self.people_every == 0:
            for _, position in self.world.people():
                self.pub_person.publish(t.PointStamped(
                    header=self._header('base_link'),
                    point=t.Point(x=float(position[0]), y=float(position[1]),
                                  z=float(position[2]))))

    def close(self) -> None:
        if self.log is not None:
            self.log.write()


def run(argv: list[str]) -> int:
    ours, ros = split_ros_args(argv)
    parser = argparse.ArgumentParser(prog='constraint-ctrl sim',
                                     description='Start the simulated work cell node.')
    transport_options(parser)
    parser.add_argument('--log', type=Path, help='save the true state to this .npz at exit')
    parser.add_argument('--publish-clock', action='store_true',
                        help='publish the simulated time on /clock and stamp messages with it')
    cfg = config_dir()
    ros_arguments(parser, f"""\
Parameters:
  scene_file       default: {cfg / 'scenes' / 'gearbox_cell.yaml'} (robot, parts, operator)
  command_topic    velocity commands it integrates (default: /constraint_controller/command)
  joint_names      order of the command (default: the robot's)
  range_rate_hz, wrench_rate_hz, people_rate_hz   sensor rates (100.0, 500.0, 30.0)
It publishes /joint_states, /tool/range_left, /tool/range_right, /tool/range_front,
/tool/wrench and /cell/operator.

With the controller (see constraint-ctrl run --help):
  constraint-ctrl sim & constraint-ctrl run --ros-args --params-file {cfg / 'controller.yaml'}""")
    args = parser.parse_args(ours)
    from ..transport.port import open_port
    port = open_port(args.transport, NODE_NAME, ros, distro=args.distro)
    serve(port, lambda: SimNode(port, log=args.log, publish_clock=args.publish_clock))
    return 0


def main(argv: list[str] | None = None) -> int:
    import sys
    from ..cli import report_errors
    return report_errors(run, list(sys.argv[1:] if argv is None else argv))


__all__ = ['SimNode', 'TruthLog', 'main', 'run']
