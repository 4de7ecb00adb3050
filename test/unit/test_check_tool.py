"""`constraint-ctrl check`: located errors, the new warnings and errors, and the loading paths.

Outside references used by the checks (named again beside each one):
- IEEE 754 double precision: 10 ** 400 overflows to inf (largest double about 1.8e308) and
  0 / 0 is NaN;
- the URDF specification (wiki.ros.org/urdf/XML/joint): ``<limit velocity=...>`` is the joint's
  maximum speed; the values are read off config/robots/six_axis_arm.urdf by hand;
- linear algebra: a row whose task function depends only on an unknown s has the Jacobian
  row [0 ... 0 | 1] (d s / d s = 1), which is not zero.
Expected lines are counted by hand from the texts; a ``# <-`` comment marks the line meant.
"""
from __future__ import annotations

import re
import textwrap
from pathlib import Path

import numpy as np
import pytest

from constraint_ctrl.errors import SkillError
from constraint_ctrl.model.kinematics import RobotModel
from constraint_ctrl.runtime.library import SkillLibrary
from constraint_ctrl.skill.compile import compile_skill
from constraint_ctrl.skill.loader import load_skill
from constraint_ctrl.tools.check import check_file

CONFIG = Path(__file__).resolve().parents[2] / 'config'
ROBOT = CONFIG / 'robots' / 'six_axis_arm.urdf'
MARK = '# <-'
LIMITS = 'limits: {joint_speed: 1.0, joint_acceleration: 5.0}\n'


def write(folder: Path, text: str, name: str = 'skill.yaml', *, limits: bool = True) -> Path:
    """A skill file: header, ``limits:`` (unless told not to), then ``text`` dedented."""
    path = folder / name
    path.write_text(f'skill: {Path(name).stem}\nrobot: {ROBOT}\n' + (LIMITS if limits else '')
                    + textwrap.dedent(text))
    return path


def marked_line(path: Path) -> int:
    hits = [i for i, line in enumerate(path.read_text().splitlines(), 1) if MARK in line]
    assert len(hits) == 1
    return hits[0]


# -- issue 8 item 12: errors with a location ---------------------------------------------------

BAD_BASE = """\
base_link: no_such_link   # <-
constraints:
  - {name: a, function: joint(joint_1), target: 0}
"""


def test_unknown_base_link_is_located_when_compiling(tmp_path: Path) -> None:
    path = write(tmp_path, BAD_BASE)
    with pytest.raises(SkillError, match="no_such_link") as info:
        compile_skill(load_skill(path))
    assert (info.value.file, info.value.line, info.value.field) == \
        (str(path), marked_line(path), 'base_link')
    with pytest.raises(SkillError) as info:
        check_file(path)
    assert info.value.line == marked_line(path)


def test_unknown_base_link_is_located_in_the_node_load_report(tmp_path: Path) -> None:
    path = write(tmp_path, BAD_BASE)
    library = SkillLibrary(tmp_path, RobotModel.from_urdf(ROBOT).joint_names)
    report = library.reload()
    assert f'{path}:{marked_line(path)}: base_link:' in report.failed['skill.yaml']


def test_offline_start_joint_the_robot_lacks_is_located(tmp_path: Path) -> None:
    path = write(tmp_path, """\
        constraints:
          - {name: a, function: joint(joint_1), target: 0}
        offline:
          start:
            joint_1: 0.1
            joint_9: 0.2   # <-
        """)
    report = check_file(path)
    assert any(e.startswith(f'{path}:{marked_line(path)}: offline.start.joint_9:')
               and 'joint_9' in e and 'joint_1' in e for e in report.errors), report.errors


@pytest.mark.parametrize('formula', ['joint(joint_2) * 10 ** 400', 'joint(joint_2) + 0 / 0'])
def test_formula_not_finite_at_the_start_names_the_row_and_its_line(tmp_path: Path,
                                                                    formula: str) -> None:
    # IEEE 754: 10 ** 400 is inf in double precision, 0 / 0 is NaN
    path = write(tmp_path, f"""\
        constraints:
          - {{name: fine, function: joint(joint_1), target: 0}}
          - name: broken
            function: {formula}   # <-
            target: 0
        """)
    report = check_file(path)
    expected = f'{path}:{marked_line(path)}: constraints[1].function: row broken'
    assert any(e.startswith(expected) and 'not finite' in e for e in report.errors), \
        report.errors
    assert not report.clean


# -- issue 10 section 2: check warnings and errors -----------------------------------------------

def test_a_skill_without_limits_is_warned_with_the_urdf_limits(tmp_path: Path) -> None:
    path = write(tmp_path, """\
        constraints:
          - {name: a, function: joint(joint_1), target: 0.1}
        offline:
          start: {joint_1: 0.0}
        """, limits=False)
    report = check_file(path)
    warning = [w for w in report.warnings if 'no limits' in w]
    assert len(warning) == 1, report.warnings
    # URDF <limit velocity> of each joint, read off six_axis_arm.urdf by hand
    for joint, speed in (('joint_1', '2'), ('joint_3', '2.5'), ('joint_6', '4')):
        assert f'{joint} {speed} rad/s' in warning[0], warning[0]
    # and the node watchdog's acceleration limit (runtime/watchdog_setup.DEFAULTS)
    assert '10 rad/s^2' in warning[0]
    path.write_text(path.read_text() + LIMITS)
    assert not [w for w in check_file(path).warnings if 'no limits' in w]


def test_rows_that_only_move_unknowns_have_a_jacobian(tmp_path: Path) -> None:
    # d s / d s = 1: the row is driven by the unknown's own velocity
    path = write(tmp_path, """\
        unknowns:
          turn: {start: 0.0, lower: -1, upper: 1, max_speed: 0.5}
        constraints:
          - {name: a, function: joint(joint_1), target: 0}
          - {name: sweep, function: turn, target: 0.5}
          - {name: fixed, function: 0.2 * time, target: 0}
        offline:
          start: {joint_1: 0.0}
        """)
    report = check_file(path)
    notes = ' '.join(report.notes)
    assert 'row sweep has a zero Jacobian' not in notes, report.notes
    # a row that nothing moves is still reported
    assert 'row fixed has a zero Jacobian' in notes, report.notes


def test_a_skill_without_constraints_is_an_error(tmp_path: Path) -> None:
    path = write(tmp_path, 'constraints: []   # <-\n')
    report = check_file(path)
    assert any(e.startswith(f'{path}:{marked_line(path)}: constraints:') and 'no constraints'
               in e for e in report.errors), report.errors
    path = write(tmp_path, '')
    assert any('no constraints' in e for e in check_file(path).errors)


def test_scalar_target_for_a_vector_function_is_an_error_naming_the_sizes(
        tmp_path: Path) -> None:
    path = write(tmp_path, """\
        constraints:
          - name: tip
            function: position(tool_tip)
            target: 0.3   # <-
        """)
    with pytest.raises(SkillError, match=r'1 value.*3 components') as info:
        compile_skill(load_skill(path))
    assert info.value.line == marked_line(path)
    assert info.value.field == 'constraints[0].target'


@pytest.mark.parametrize(('kind', 'bounds'), [('equal', 'target: 0'),
                                              ('within', 'lower: -0.1, upper: 0.1'),
                                              ('at_most', 'upper: 0.05')])
def test_zero_target_and_scalar_bounds_of_inequalities_still_mean_every_component(
        tmp_path: Path, kind: str, bounds: str) -> None:
    # 0 is the zero vector; a number bound of an inequality bounds each component (a box)
    path = write(tmp_path, f"""\
        constraints:
          - {{name: tilt, function: 'cross(axis_z(tool_tip), vector(0, 0, -1))', kind: {kind},
              {bounds}}}
        """)
    assert compile_skill(load_skill(path)).n_rows == 3


def test_the_example_skills_are_clean() -> None:
    for path in sorted((CONFIG / 'skills').glob('*.yaml')):
        report = check_file(path)
        assert report.clean, '\n'.join(report.lines())


def test_check_lines_show_errors_before_warnings(tmp_path: Path) -> None:
    path = write(tmp_path, 'constraints: []\n')
    lines = check_file(path).lines()
    kinds = [re.match(r'\s+(error|warning|note)', line) for line in lines[1:-1]]
    order = [m.group(1) for m in kinds if m]
    assert order == sorted(order, key=['error', 'warning', 'note'].index)
    assert lines[-1].strip().endswith('warning(s)')


# -- issue 10 section 2: behaviours against the control rate and input delay ----------------------

SENSED = """\
inputs:
  gap: {unit: m, rate_hz: 100}
tunables:
  follow_gain: {value: 40.0, lower: 1.0, upper: 400.0, unit: 1/s}
constraints:
  - name: follow                                   # through the 100 Hz input
    function: joint(joint_1) - value_now(joint(joint_1)) + gap
    target: 0
    behaviour: {order: 1, gain: follow_gain}       # <-
  - name: wrist                                    # joints only: no delay
    function: joint(joint_5)
    target: 0.8
    behaviour: {order: 2, natural_frequency: 600.0, damping_ratio: 0.7}
offline:
  start: {joint_5: 0.8}
  inputs: {gap: 0.0}
"""


def test_behaviours_are_checked_against_the_rate_and_the_input_delay(tmp_path: Path) -> None:
    # 500 Hz, a 100 Hz input: a sample is up to 10 ms = 5 ticks old; first-order limit
    # K dt < 2 sin(pi / 22) (skill/stability.py), i.e. K < 142.3 1/s. The gain 40 is fine, its
    # tunable upper bound 400 is not. The wrist row has no input: w dt < 2 / (0.7 +
    # sqrt(1.49)) = 1.0413, w < 520.7 rad/s at 500 Hz, so 600 is beyond.
    path = write(tmp_path, SENSED)
    report = check_file(path)
    limit = 2 * np.sin(np.pi / 22) * 500
    gain = [w for w in report.warnings if 'behaviour.gain' in w]
    assert len(gain) == 1 and 'upper bound' in gain[0] and f'{limit:.4g} 1/s' in gain[0]
    assert gain[0].startswith(f'{path}:{marked_line(path)}: constraints[0].behaviour.gain')
    assert "5 tick(s) of input delay (input 'gap' at 100 Hz" in gain[0]
    omega = [w for w in report.warnings if 'natural_frequency' in w]
    assert len(omega) == 1 and '520.7 rad/s' in omega[0] and 'no delay' in omega[0]
    # at 2 kHz the wrist row is fine (limit 2083 rad/s) and the gain limit is 20 ticks:
    # 2 sin(pi / 82) * 2000 = 153.2 1/s
    report = check_file(path, rate_hz=2000.0)
    assert not [w for w in report.warnings if 'natural_frequency' in w]
    assert any(f'{2 * np.sin(np.pi / 82) * 2000:.4g} 1/s' in w for w in report.warnings)
