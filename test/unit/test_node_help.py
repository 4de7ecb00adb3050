"""`run --help`, `sim --help` and `sequence --help` say how ROS arguments reach the node, and the
default skills folder is the one the node really uses (README and help agree with the code).

The ROS argument forms are rcl's (`-p name:=value`, `--params-file FILE`, `-r from:=to`,
`--log-level`; rcl/src/arguments.c, ros2-interop.md), which transport/ros_args.py reproduces.
"""
from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pytest

from constraint_ctrl.nodes.common import config_dir

ROOT = Path(__file__).resolve().parents[2]
README = (ROOT / 'README.md').read_text()


def _help(command: str) -> str:
    out = subprocess.run([sys.executable, '-m', 'constraint_ctrl.cli', command, '--help'],
                         cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr
    return out.stdout


@pytest.mark.parametrize('command', ['run', 'sim', 'sequence'])
def test_help_shows_the_ros_arguments(command: str) -> None:
    text = _help(command)
    usage = text.split('\n\n')[0]
    assert '--ros-args' in usage, usage
    for form in ('-p NAME:=VALUE', '--params-file FILE', '-r FROM:=TO', '--log-level'):
        assert form in text, (form, text)


def test_run_help_states_the_real_default_skills_folder() -> None:
    text = _help('run')
    # the node declares skills_folder with config_dir() / 'skills' (controller_node.py)
    default = config_dir() / 'skills'
    assert sorted(p.name for p in default.glob('*.yaml')), 'the default folder has the examples'
    match = re.search(r'skills_folder\s+default: (\S+)', text)
    assert match, text
    assert Path(match.group(1)) == default
    match = re.search(r'robot_description_file\s+default: (\S+)', text)
    assert match and Path(match.group(1)) == config_dir() / 'robots' / 'six_axis_arm.urdf'


def test_readme_states_the_default_skills_folder() -> None:
    # the parameter list of "The controller node"
    match = re.search(r'`skills_folder` \(default: ([^)]*)\)', README)
    assert match, 'README lists skills_folder with its default'
    assert 'config/skills' in match.group(1), match.group(0)


def readme_recipe(readme: str = README) -> list[str]:
    """The lines of the README's fenced block that runs the node with your own skills against
    the simulator (the block holding `constraint-ctrl sim &`)."""
    for block in re.findall(r'```sh\n(.*?)```', readme, flags=re.S):
        if 'constraint-ctrl sim &' in block:
            return [line.split('  #')[0].strip() for line in block.splitlines() if line.strip()]
    raise AssertionError('README has no recipe block with `constraint-ctrl sim &`')


def test_readme_recipe_is_the_one_run_help_gives() -> None:
    """The recipe (your own skills folder against the simulator) is the same in README and
    `run --help` (there with the installed config folder); test/integration/test_remote_cli.py
    runs the README's lines as written."""
    recipe = readme_recipe()
    assert any('skills_folder:=' in line and 'initial_skill:=' in line for line in recipe)
    text = _help('run').replace(str(config_dir()), 'config')
    for line in recipe:
        assert line in text, (line, text)
