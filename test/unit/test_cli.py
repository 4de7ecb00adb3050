"""The command line: argument checks of `simulate`, valid JSON, one-line errors, --debug, functions.

Outside references used by the checks (named again beside each one):
- RFC 8259 (JSON): numbers are finite; ``NaN`` and ``Infinity`` are not JSON, so a strict
  parser (Python's ``json`` with ``parse_constant`` refusing them) must accept report.json;
- IEEE 754: ``float('nan')`` and ``float('inf')`` are what argparse's ``type=float`` makes of
  the texts nan and inf.
"""
from __future__ import annotations

import json
import textwrap
from pathlib import Path

import pytest

from constraint_ctrl import cli
from constraint_ctrl.skill.formula import CONSTANTS, FUNCTIONS
from constraint_ctrl.tools import simulate

CONFIG = Path(__file__).resolve().parents[2] / 'config'
ROBOT = CONFIG / 'robots' / 'six_axis_arm.urdf'
SKILL = CONFIG / 'skills' / 'move_to_point.yaml'


def one_error_line(capsys: pytest.CaptureFixture[str]) -> str:
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert 'Traceback' not in err
    return lines[0]


@pytest.mark.parametrize(('options', 'words'), [
    (['--duration', 'nan'], 'duration must be a finite number > 0'),
    (['--duration', 'inf'], 'duration must be a finite number > 0'),
    (['--duration', '-1'], 'duration must be a finite number > 0'),
    (['--tick', 'nan'], 'tick must be a finite number > 0'),
    (['--tick', '0'], 'tick must be a finite number > 0'),
    (['--duration', '1e9'], 'at most 1,000,000 ticks'),
    (['--duration', '10', '--tick', '1e-9'], 'at most 1,000,000 ticks'),
])
def test_simulate_refuses_bad_numbers_in_one_line(tmp_path: Path,
                                                  capsys: pytest.CaptureFixture[str],
                                                  options: list[str], words: str) -> None:
    code = cli.main(['simulate', str(SKILL), '--out', str(tmp_path / 'out'), '--quiet',
                     *options])
    assert code == 2
    line = one_error_line(capsys)
    assert line.startswith('error: ') and words in line
    assert not (tmp_path / 'out').exists()        # refused before any work


def test_simulate_refuses_an_out_path_that_is_a_file(tmp_path: Path,
                                                     capsys: pytest.CaptureFixture[str]) -> None:
    target = tmp_path / 'taken'
    target.write_text('keep me\n')
    code = cli.main(['simulate', str(SKILL), '--out', str(target), '--duration', '0.01',
                     '--quiet'])
    assert code == 2
    assert 'is a file' in one_error_line(capsys)
    assert target.read_text() == 'keep me\n'


def test_report_json_is_strict_json_also_with_non_finite_values(tmp_path: Path) -> None:
    # A row that is NaN from the first tick (0 / 0, IEEE 754): its errors are NaN, the watchdog
    # stops the arm. RFC 8259 has no NaN/Infinity: a strict parser must read the report.
    skill = tmp_path / 'nan.yaml'
    skill.write_text(f'skill: nan_row\nrobot: {ROBOT}\n' + textwrap.dedent("""\
        limits: {joint_speed: 1.0, joint_acceleration: 5.0}
        constraints:
          - {name: fine, function: joint(joint_1), target: 0.1}
          - {name: broken, function: joint(joint_2) + 0 / 0, target: 0}
        """))
    out = tmp_path / 'out'
    assert cli.main(['simulate', str(skill), '--duration', '0.02', '--out', str(out),
                     '--quiet']) == 1                  # ticks that did not solve: exit 1

    def refuse(name: str) -> None:
        raise AssertionError(f'{name} in report.json')

    report = json.loads((out / 'report.json').read_text(), parse_constant=refuse)
    assert report['constraints']['broken']['final_error'] is None     # NaN -> null
    assert report['non_finite_numbers'] == 'written as null'


def test_an_unexpected_exception_is_one_line_with_exit_1(monkeypatch: pytest.MonkeyPatch,
                                                        capsys: pytest.CaptureFixture[str],
                                                        tmp_path: Path) -> None:
    def broken(*_args: object, **_kwargs: object) -> None:
        raise RuntimeError('something nobody expected')

    monkeypatch.setattr(simulate, 'simulate_file', broken)
    argv = ['simulate', str(SKILL), '--out', str(tmp_path / 'o'), '--duration', '0.01']
    assert cli.main(argv) == 1
    line = one_error_line(capsys)
    assert 'RuntimeError: something nobody expected' in line and '--debug' in line
    # --debug (a global option) adds the traceback
    assert cli.main(['--debug', *argv]) == 1
    err = capsys.readouterr().err
    assert 'Traceback (most recent call last)' in err and 'something nobody expected' in err


def test_node_commands_report_unexpected_exceptions_the_same_way(
        monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    def broken(command: str, argv: list[str]) -> int:
        raise ValueError(f'{command} {argv}')

    monkeypatch.setattr(cli, '_run_node', broken)
    assert cli.main(['run', '--record', 'x']) == 1
    assert "ValueError: run ['--record', 'x']" in one_error_line(capsys)
    assert cli.main(['--debug', 'sim']) == 1
    assert 'Traceback' in capsys.readouterr().err


def test_check_goes_on_after_a_file_that_cannot_be_loaded(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    bad = tmp_path / 'bad.yaml'
    bad.write_text(f'skill: bad\nrobot: {ROBOT}\nbase_link: nowhere\n')
    code = cli.main(['check', str(bad), str(SKILL)])
    captured = capsys.readouterr()
    assert code == 2
    assert f'{bad}:3: base_link:' in captured.err
    assert "skill 'move_to_point'" in captured.out      # the second file was still checked


def test_functions_lists_every_name_a_formula_may_use(capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(['functions']) == 0
    out = capsys.readouterr().out
    names = {line.split('(')[0].split(' ')[0].strip() for line in out.splitlines() if line.strip()}
    assert set(FUNCTIONS) <= names
    assert {'time', 'pi'} <= names and set(CONSTANTS) <= names
    assert 'seconds since the skill was activated' in out


def test_simulate_refuses_a_trace_larger_than_the_memory_bound(
        tmp_path: Path, capsys: pytest.CaptureFixture[str],
        monkeypatch: pytest.MonkeyPatch) -> None:
    # move_to_point: 6 joints, 0 unknowns, 8 rows -> 4 * 6 + 3 * 8 + 2 = 50 numbers per tick
    monkeypatch.setattr(simulate, 'MAX_TRACE_VALUES', 50 * 100)
    argv = ['simulate', str(SKILL), '--out', str(tmp_path / 'o'), '--quiet', '--tick', '0.01']
    assert cli.main([*argv, '--duration', '1.01']) == 2      # 101 ticks: 5050 numbers
    line = one_error_line(capsys)
    assert '50 numbers each' in line and 'at most 5,000' in line
    assert not (tmp_path / 'o').exists()
