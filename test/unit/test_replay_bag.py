"""`constraint-ctrl replay` on a bag whose tick alignment is known exactly.

The bag is written here with rosbags (its ROS 2 Jazzy type store and rosbag2 MCAP writer, the
outside reference for the format), from a lockstep run of the node's own ControlLoop and
watchdog: every joint_states, wrench and person sample of a tick is logged before that tick's
command and after the previous one, as a node would record them if its tick took no time. With
no ambiguity in the alignment the replay must give back the recorded commands to round-off;
that checks the reading of the bag, the input mapping from the parameters file, the command's
joint order, the person positions reaching the watchdog and the window between activations.
The demo's real bag, where the alignment is ambiguous, is test/integration/test_replay_demo.py.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from rosbags.rosbag2 import StoragePlugin, Writer
from rosbags.typesys import Stores, get_typestore

from constraint_ctrl.cli import main
from constraint_ctrl.model.kinematics import RobotModel
from constraint_ctrl.runtime.library import SkillLibrary
from constraint_ctrl.runtime.loop import ControlLoop, InputSample, Snapshot
from constraint_ctrl.runtime.watchdog_setup import build_watchdog
from constraint_ctrl.safety.watchdog import PersonSample
from constraint_ctrl.tools.replay import index_bag, read_recorded_rows

CONFIG = Path(__file__).resolve().parents[2] / 'config'
SKILL = CONFIG / 'skills' / 'seat_gear.yaml'
NODE = '/constraint_controller'
DT = 0.002
T0 = 1_000_000_000_000          # ns; the bag's clock
TICKS = 260
ACTIVATE_AT = 5                 # tick whose command is the skill's first
OTHER_AT = 250                  # 'activated_<another skill>' is logged after this tick's command
#: the bag begins with tick 0's joint_states sample, 0.4 ms before tick 0 and 0.7 ms before the
#: tick's command: bag seconds of tick k's command are k * DT + BAG_OFFSET
BAG_OFFSET = 0.0007
START = np.array([-0.3805, 0.6262, 0.4774, 0.0, 0.4672, -0.3805])


class _One:
    def __init__(self, loaded):
        self.loaded = loaded

    def get(self, name):
        return self.loaded if name == self.loaded.name else None


@pytest.fixture(scope='module')
def recording(tmp_path_factory: pytest.TempPathFactory) -> dict:
    root = tmp_path_factory.mktemp('replay')
    params = root / 'controller.yaml'
    order = ['joint_6', 'joint_5', 'joint_4', 'joint_3', 'joint_2', 'joint_1']
    params.write_text(
        'constraint_controller:\n  ros__parameters:\n'
        f'    joint_names: {order}\n    rate_hz: {1 / DT}\n'
        '    people:\n      sources: [/cell/operator]\n      timeout: 0.2\n'
        '    inputs:\n      tool_force_z: {topic: /tool/wrench, '
        'type: geometry_msgs/msg/WrenchStamped, field: wrench.force.z}\n'
        '    watchdog:\n      reduced_zone: 1.5\n')
    store = get_typestore(Stores.ROS2_JAZZY)
    T = store.types
    model = RobotModel.from_urdf(CONFIG / 'robots' / 'six_axis_arm.urdf')
    library = SkillLibrary(SKILL.parent, model.joint_names)
    loaded = library.load_file(SKILL)
    watchdog = build_watchdog(model, DT, {'reduced_zone': 1.5}, {'/cell/operator': 0.2})
    loop = ControlLoop(_One(loaded), watchdog, DT, person_sources=['/cell/operator'])
    to_command = [model.joint_names.index(j) for j in order]

    def header(ns: int):
        return T['std_msgs/msg/Header'](
            stamp=T['builtin_interfaces/msg/Time'](sec=ns // 10**9, nanosec=ns % 10**9),
            frame_id='')

    bag = root / 'bag'
    writer = Writer(bag, version=9, storage_plugin=StoragePlugin.MCAP)
    writer.open()
    types = {'/joint_states': 'sensor_msgs/msg/JointState',
             '/tool/wrench': 'geometry_msgs/msg/WrenchStamped',
             '/cell/operator': 'geometry_msgs/msg/PointStamped',
             f'{NODE}/command': 'std_msgs/msg/Float64MultiArray',
             f'{NODE}/joint_command': 'sensor_msgs/msg/JointState',
             f'{NODE}/events': 'std_msgs/msg/String',
             f'{NODE}/status': 'diagnostic_msgs/msg/DiagnosticArray'}
    conns = {topic: writer.add_connection(topic, kind, typestore=store)
             for topic, kind in types.items()}

    def write(topic: str, ns: int, msg) -> None:
        writer.write(conns[topic], ns, store.serialize_cdr(msg, types[topic]))

    rng = np.random.default_rng(5)
    q = START.copy()
    people = {}
    commands, states, rows = [], [], []
    for k in range(TICKS):
        t = T0 + k * int(DT * 1e9)
        js_stamp = t - 500_000
        noisy = q + 2e-5 * rng.standard_normal(6)
        write('/joint_states', t - 400_000, T['sensor_msgs/msg/JointState'](
            header=header(js_stamp), name=list(model.joint_names), position=noisy,
            velocity=np.zeros(0), effort=np.zeros(0)))
        force = -6.0 + 0.15 * rng.standard_normal()
        vector = T['geometry_msgs/msg/Vector3']
        write('/tool/wrench', t - 300_000, T['geometry_msgs/msg/WrenchStamped'](
            header=header(js_stamp), wrench=T['geometry_msgs/msg/Wrench'](
                force=vector(x=0.0, y=0.0, z=force), torque=vector(x=0.0, y=0.0, z=0.0))))
        if k % 10 == 0:   # an operator walking towards the arm at 50 Hz: into the reduced zone
            person = np.array([2.2 - 1.2 * k * DT * 4, -0.2, 1.0])
            write('/cell/operator', t - 200_000, T['geometry_msgs/msg/PointStamped'](
                header=header(t - 1_000_000),
                point=T['geometry_msgs/msg/Point'](x=person[0], y=person[1], z=person[2])))
            people['/cell/operator'] = PersonSample('/cell/operator', person,
                                                    (t - 1_000_000) * 1e-9)
        if k == ACTIVATE_AT:
            loop.request_activation('seat_gear')
        now_ns = t + 300_000
        out = loop.step(Snapshot(now=now_ns * 1e-9, q=noisy, joint_state_stamp=js_stamp * 1e-9,
                                 inputs={'tool_force_z': InputSample(force, js_stamp * 1e-9)},
                                 people=dict(people)))
        command = out.command[to_command]
        dim = T['std_msgs/msg/MultiArrayDimension'](label='joint_velocity', size=6, stride=6)
        write(f'{NODE}/command', now_ns, T['std_msgs/msg/Float64MultiArray'](
            layout=T['std_msgs/msg/MultiArrayLayout'](dim=[dim], data_offset=0), data=command))
        write(f'{NODE}/joint_command', now_ns + 100_000, T['sensor_msgs/msg/JointState'](
            header=header(js_stamp), name=order, position=np.zeros(0), velocity=command,
            effort=np.zeros(0)))
        for name in out.events + ([f'activated_{out.activated}'] if out.activated else []):
            write(f'{NODE}/events', now_ns + 200_000, T['std_msgs/msg/String'](data=name))
        if k == OTHER_AT:
            write(f'{NODE}/events', now_ns + 250_000,
                  T['std_msgs/msg/String'](data='activated_move_to_point'))
        if out.tick is not None and k % 5 == 0:
            report = loop.active.diagnostics()
            kv = T['diagnostic_msgs/msg/KeyValue']
            values = [kv(key=f'{r.name}.error', value=f'{report.error[i]:.6g}')
                      for i, r in enumerate(loaded.compiled.rows)]
            status = T['diagnostic_msgs/msg/DiagnosticStatus']
            write(f'{NODE}/status', now_ns + 300_000, T['diagnostic_msgs/msg/DiagnosticArray'](
                header=header(now_ns), status=[
                    status(level=0, name='constraint_controller: controller', message='',
                           hardware_id='', values=[kv(key='skill', value='seat_gear')]),
                    status(level=0, name='constraint_controller: rows', message='',
                           hardware_id='', values=values)]))
            rows.append(((now_ns - T0) * 1e-9, report.error.copy()))
        commands.append(command)
        states.append(out.watchdog.state.value)
        q = q + DT * out.command
    writer.close()
    return {'bag': bag, 'params': params, 'commands': np.array(commands), 'states': states,
            'rows': rows, 'root': root, 'row_names': [r.name for r in loaded.compiled.rows]}


def _replay(recording: dict, out: Path, *extra: str) -> dict:
    code = main(['replay', str(recording['bag']), '--skill', str(SKILL), '--params',
                 str(recording['params']), '--out', str(out), *extra])
    assert code == 0
    return json.loads((out / 'summary.json').read_text())


def test_exact_alignment_reproduces_the_commands(recording: dict, tmp_path: Path) -> None:
    summary = _replay(recording, tmp_path)
    # the window: from the activation to the tick before the next skill's first command (its
    # 'activated_' event follows that command, as in the node)
    assert summary['ticks_compared'] == OTHER_AT - ACTIVATE_AT
    assert summary['ticks_joint_states_matched_by_stamp'] == summary['ticks_compared']
    assert summary['max_abs_difference'] <= 1e-12, summary['joints']
    # the person reached the watchdog: the recording slowed down and so did the replay
    expected = recording['states'][ACTIVATE_AT:OTHER_AT]
    assert 'reduced' in expected
    assert summary['watchdog_states'] == {s: expected.count(s) for s in sorted(set(expected))}
    assert (tmp_path / 'commands.png').exists() and (tmp_path / 'rows.png').exists()


def test_a_changed_gain_changes_the_commands(recording: dict, tmp_path: Path) -> None:
    summary = _replay(recording, tmp_path, '--set', 'press.gain=15')
    assert summary['tunables_set'] == {'press.gain': 15}
    assert summary['max_abs_difference'] > 1e-3


def test_window_options(recording: dict, tmp_path: Path) -> None:
    start = (ACTIVATE_AT + 50) * DT + BAG_OFFSET    # bag seconds of tick 55's command
    summary = _replay(recording, tmp_path, '--from', f'{start - 1e-4}', '--to',
                      f'{start + 99 * DT + 1e-4}')
    assert summary['ticks_compared'] == 100
    assert 'after the recorded activation' in summary['window']['note']


def test_recorded_rows_come_from_status(recording: dict) -> None:
    index = index_bag(recording['bag'])
    rows = read_recorded_rows(index, 'seat_gear', 0.0, 10.0)
    times = np.array([t for t, _ in recording['rows']])
    assert np.allclose(rows.time, times + BAG_OFFSET, atol=1e-9)
    for i, name in enumerate(recording['row_names']):
        written = np.array([values[i] for _, values in recording['rows']])
        assert np.allclose(rows.values[name]['error'], written, rtol=1e-5, atol=1e-12)


def test_bad_options_are_clear_errors(recording: dict, tmp_path: Path, capsys) -> None:
    code = main(['replay', str(recording['bag']), '--skill', str(SKILL), '--params',
                 str(recording['params']), '--out', str(tmp_path), '--set', 'no_such=1'])
    assert code == 2
    assert "no tunable 'no_such'" in capsys.readouterr().err
    code = main(['replay', str(tmp_path), '--skill', str(SKILL)])
    assert code == 2
    assert 'not a rosbag2 folder' in capsys.readouterr().err
