"""Offline behaves like online: `simulate` runs the node's ControlLoop and watchdog.

Each test drives the runtime ControlLoop the way the controller node builds it (a SkillLibrary
on a skills folder, ``build_watchdog`` from the URDF with the node's default settings, person
timeouts from ``people.timeout``) on the same inputs as ``simulate`` and compares the commands,
then checks the report's per-stage numbers against what the node loop's own outputs show.

Outside references used by the checks (named again beside each one):
- ISO 10218-1 reduced speed 0.25 m/s (the node's default ``watchdog.reduced_speed``, from
  memory): while the watchdog is in state reduced, no monitored point moves faster;
- the URDF ``<limit velocity>`` of each joint (config/robots/six_axis_arm.urdf, read by hand):
  joint_1 2.0 rad/s, joint_4 3.0 rad/s;
- kinematics: the speed of a point is |J(q) q_dot| (the model's kinematics are checked against
  Pinocchio in test/reference/test_kinematics_pinocchio.py).
"""
from __future__ import annotations

import json
import shutil
import textwrap
from pathlib import Path

import numpy as np
import pytest

from constraint_ctrl.model.kinematics import RobotModel
from constraint_ctrl.runtime.library import SkillLibrary
from constraint_ctrl.runtime.loop import ControlLoop, Snapshot
from constraint_ctrl.runtime.watchdog_setup import DEFAULTS, build_watchdog, points_function
from constraint_ctrl.safety.watchdog import PersonSample
from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.skill.loader import load_skill
from constraint_ctrl.tools import simulate

CONFIG = Path(__file__).resolve().parents[2] / 'config'
URDF = CONFIG / 'robots' / 'six_axis_arm.urdf'
START = ('{joint_1: 0.0, joint_2: 0.0415, joint_3: 0.6889, joint_4: 0.0, joint_5: 0.8404, '
         'joint_6: 3.1416}')
DT = 0.002                                # the node's default tick (rate_hz 500)
ACCEL = DEFAULTS['joint_acceleration']    # the node's default watchdog.joint_acceleration


def skill_folder(tmp_path: Path, body: str, name: str = 'reach') -> Path:
    folder = tmp_path / 'skills'
    folder.mkdir(exist_ok=True)
    path = folder / f'{name}.yaml'
    path.write_text(f'skill: {name}\nrobot: {URDF}\n' + textwrap.dedent(body))
    return path


NO_LIMITS = f"""\
constraints:
  - {{name: turn, function: joint(joint_1), target: 1.0, behaviour: {{order: 1, gain: 10}}}}
  - {{name: roll, function: joint(joint_4), target: -2.5, behaviour: {{order: 1, gain: 10}}}}
offline:
  start: {START}
"""


def node_loop(folder: Path, people_sources: tuple[str, ...] = ()) -> tuple[ControlLoop,
                                                                          RobotModel]:
    """The ControlLoop as nodes/controller_node.py builds it (default parameters)."""
    model = RobotModel.from_urdf(URDF)
    library = SkillLibrary(folder, model.joint_names)
    report = library.reload()
    assert report.ok, report.summary()
    watchdog = build_watchdog(model, DT, dict(DEFAULTS), {s: 0.2 for s in people_sources})
    return ControlLoop(library, watchdog, DT, person_sources=people_sources), model


def test_a_skill_without_limits_is_capped_offline_as_on_the_robot(tmp_path: Path) -> None:
    path = skill_folder(tmp_path, NO_LIMITS)
    skill = compile_skill(load_skill(path))
    seconds = 1.5
    trace = simulate.run(skill, seconds, DT)
    summary = simulate.summarise(skill, trace, seconds, DT)

    # The node's loop on the same inputs: exact integration of what it publishes.
    loop, model = node_loop(path.parent)
    loop.request_activation('reach')
    q = simulate.start_pose(skill)
    published, requested = [], []
    for k in range(len(trace.time)):
        out = loop.step(Snapshot(now=k * DT, q=q.copy(), joint_state_stamp=k * DT))
        assert out.tick is not None and out.tick.ok
        published.append(out.command)
        requested.append(out.tick.joint_velocity)
        q = q + DT * out.command
    published, requested = np.array(published), np.array(requested)

    # same commands, tick by tick (same code, same numbers)
    np.testing.assert_allclose(trace.joint_velocity, published, rtol=0, atol=1e-12)
    np.testing.assert_allclose(trace.requested_velocity, requested, rtol=0, atol=1e-12)
    # the solver asks for the URDF speed limits at once (joint_1 2.0, joint_4 3.0 rad/s) ...
    assert requested[0, 0] == pytest.approx(2.0) and requested[0, 3] == pytest.approx(-3.0)
    # ... but the first published command is one acceleration step (10 rad/s^2 x 2 ms)
    assert np.abs(published[0]).max() == pytest.approx(ACCEL * DT)
    steps = np.abs(np.diff(np.vstack([np.zeros(6), published]), axis=0))
    assert steps.max() <= ACCEL * DT * (1 + 1e-9)

    # the report's acceleration stage: the ticks where the node loop changed the request
    capped = np.abs(requested - published).max(axis=1) > 1e-9
    stage = summary['watchdog']['stages']['acceleration']
    assert stage['ticks'] == int(capped.sum()) > 0
    assert stage['seconds'] == pytest.approx(capped.sum() * DT)
    previous = np.vstack([np.zeros(6), published[:-1]])
    ratio = (np.abs(requested - previous) / (ACCEL * DT))[capped].max()
    assert stage['max_ratio'] == pytest.approx(ratio)
    assert stage['joints'] == ['joint_1', 'joint_4']
    assert stage['first_s'] == 0.0
    for other in ('position_limits', 'joint_speed', 'reduced_speed', 'separation'):
        assert summary['watchdog']['stages'][other]['ticks'] == 0, other
    assert summary['watchdog']['unexplained_ticks'] == 0
    assert summary['max_joint_speed']['published']['joint_1'] <= 2.0 + 1e-9


PERSON_SCENE = """\
operator:
  name: operator
  height: 1.0
  start: {at_time: 0.0}
  path:
    - {to: [1.45, 0.0]}
    - {to: [1.40, 0.0], speed: 0.05}
"""


def scene_skill(tmp_path: Path, reduced_speed: float | None = None) -> Path:
    """A fast joint_1 move (away from a person standing 1.4 m from the base) in a scene."""
    text = (CONFIG / 'scenes' / 'gearbox_cell.yaml').read_text()
    text = text.replace('urdf: ../robots/six_axis_arm.urdf', f'urdf: {URDF}')
    text = text[:text.index('operator:')] + PERSON_SCENE
    (tmp_path / 'scene.yaml').write_text(text)
    return skill_folder(tmp_path, f"""\
        limits: {{joint_speed: 1.5, joint_acceleration: 8.0}}
        constraints:
          - {{name: turn, function: joint(joint_1), target: -1.2, behaviour: {{order: 1, gain: 6}}}}
        offline:
          start: {START}
          scene: ../scene.yaml
        """)


def test_reduced_speed_near_a_person_is_applied_offline_as_on_the_robot(tmp_path: Path) -> None:
    path = scene_skill(tmp_path)
    skill = compile_skill(load_skill(path))
    seconds = 1.2
    trace = simulate.run(skill, seconds, DT)
    summary = simulate.summarise(skill, trace, seconds, DT)

    loop, model = node_loop(path.parent, ('operator',))
    loop.request_activation('reach')
    plant = simulate.ScenePlant(skill)          # the same simulated cell, same noise seed
    published, states = [], []
    for k in range(len(trace.time)):
        t = k * DT
        q, _ = plant.measured()
        people = {name: PersonSample(name, pos, t) for name, pos in plant.people()}
        out = loop.step(Snapshot(now=t, q=np.array(q), joint_state_stamp=t, people=people))
        published.append(out.command)
        states.append(out.watchdog.state.value)
        plant.apply(DT, out.command)
    published = np.array(published)
    np.testing.assert_allclose(trace.joint_velocity, published, rtol=0, atol=1e-12)
    assert trace.state == states
    assert 'reduced' in states

    # ISO 10218-1 reduced speed (0.25 m/s): no monitored point faster while reduced; the
    # ticks where the cap binds are the reduced-speed stage's ticks in the report
    _, fn = points_function(model)
    speeds = []
    for q, command in zip(trace.q, published):
        jac = np.asarray(fn(q)[1])
        speeds.append(np.linalg.norm((jac @ command).reshape(-1, 3), axis=1).max())
    speeds = np.array(speeds)
    reduced = np.array(states) == 'reduced'
    # trace.q is the true pose, the watchdog saw the measured one (noise 2e-5 rad): margin
    assert speeds[reduced].max() <= DEFAULTS['reduced_speed'] * (1 + 1e-3)
    binding = reduced & (speeds >= DEFAULTS['reduced_speed'] * (1 - 1e-3))
    stage = summary['watchdog']['stages']['reduced_speed']
    assert stage['ticks'] == int(binding.sum()) > 0
    assert stage['max_ratio'] > 1.0
    assert summary['watchdog']['stages']['separation']['ticks'] == 0   # person far enough
    assert summary['watchdog']['unexplained_ticks'] == 0
    assert summary['seconds_in_state']['reduced'] == pytest.approx(reduced.sum() * DT)


def test_node_parameters_file_sets_the_watchdog(tmp_path: Path) -> None:
    params = tmp_path / 'controller.yaml'
    text = (CONFIG / 'controller.yaml').read_text().replace(
        'reduced_speed: 0.25', 'reduced_speed: 0.1').replace('rate_hz: 500.0', 'rate_hz: 250.0')
    params.write_text(text)
    settings = simulate.node_settings(params)
    assert settings.watchdog['reduced_speed'] == 0.1 and settings.rate_hz == 250.0
    assert settings.watchdog['joint_acceleration'] == 10.0
    shipped = simulate.node_settings(CONFIG / 'controller.yaml')
    assert {k: shipped.watchdog[k] for k in shipped.watchdog} == \
        {k: DEFAULTS[k] for k in shipped.watchdog}      # the shipped file = the defaults

    path = scene_skill(tmp_path)
    summary, _ = simulate.simulate_file(path, 0.8, tmp_path / 'out', progress=False,
                                        params_file=params)
    assert summary['tick_s'] == pytest.approx(1 / 250.0)
    report = json.loads((tmp_path / 'out' / 'report.json').read_text())
    assert str(params) in report['watchdog']['settings']
    assert report['watchdog']['stages']['reduced_speed']['ticks'] > 0


def test_unknown_watchdog_parameter_in_the_file_is_refused(tmp_path: Path) -> None:
    params = tmp_path / 'p.yaml'
    params.write_text('constraint_controller:\n  ros__parameters:\n    watchdog:\n'
                      '      reduced_sped: 0.1\n')
    with pytest.raises(simulate.SimulateError, match='reduced_sped'):
        simulate.node_settings(params)
    shutil.rmtree(tmp_path / 'skills', ignore_errors=True)


def test_a_parameters_file_that_expands_beyond_the_budget_is_refused(tmp_path: Path) -> None:
    # nested mapping aliases (10 keys per level) stand for 10**6 parameters: the parameter
    # reader flattens every one of them into its own dotted name
    keys = 'abcdefghij'
    lines = ['constraint_controller:', '  ros__parameters:',
             '    m0: &m0 {' + ', '.join(f'{k}: 1' for k in keys) + '}']
    lines += [f'    m{i}: &m{i} {{' + ', '.join(f'{k}: *m{i - 1}' for k in keys) + '}'
              for i in range(1, 7)]
    params = tmp_path / 'p.yaml'
    params.write_text('\n'.join(lines) + '\n')
    with pytest.raises(simulate.SimulateError, match='holds more than 100,000 values'):
        simulate.node_settings(params)
