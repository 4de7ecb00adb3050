"""The README's recipe and `constraint-ctrl call | param | echo` against the real processes.

The module starts the simulated cell and the controller exactly as the README's recipe says
("Your own skills against the simulated cell": a copy of the package's config folder in
`my_cell/`, then `constraint-ctrl sim & constraint-ctrl run --ros-args ...`), in a fresh folder
holding a copy of the package's config folder, on a random ROS_DOMAIN_ID given to every process
explicitly. Then it drives the controller only through the command line, each command its own
process, and checks the output and exit codes against the node's real state: what the node
publishes, what it answers, and files outside the node (the skills folder, the parameters file).

Nothing here depends on timing: waits are eventual outcomes with generous limits, and a step
that can lose a race on a loaded machine (an event published before the echo's reader was
matched) is repeated, never timed.
"""
from __future__ import annotations

import os
import random
import re
import shlex
import shutil
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
import yaml

pytest.importorskip('cyclonedds')

pytestmark = pytest.mark.integration
ROOT = Path(__file__).resolve().parents[2]
DOMAIN = str(random.randint(100, 230))
NODE = '/constraint_controller'
CLI = [sys.executable, '-m', 'constraint_ctrl.cli']


def readme_recipe() -> list[str]:
    """The README's fenced block that holds `constraint-ctrl sim &`, one command per line."""
    text = (ROOT / 'README.md').read_text()
    for block in re.findall(r'```sh\n(.*?)```', text, flags=re.S):
        if 'constraint-ctrl sim &' in block:
            return [line.split('  #')[0].strip() for line in block.splitlines() if line.strip()]
    raise AssertionError('README has no recipe block with `constraint-ctrl sim &`')


def _env() -> dict[str, str]:
    return {**os.environ, 'ROS_DOMAIN_ID': DOMAIN, 'PYTHONPATH': str(ROOT)}


def _argv(command: str) -> list[str]:
    words = shlex.split(command)
    assert words[0] == 'constraint-ctrl', command
    return CLI + words[1:]


class Cell:
    """The recipe's two processes and the folder they run in."""

    def __init__(self, work: Path) -> None:
        self.work = work
        # the README runs from the package's folder; a copy, so nothing here writes into it
        shutil.copytree(ROOT / 'config', work / 'config')
        recipe = readme_recipe()
        assert len(recipe) == 2, recipe
        copy, start = recipe
        subprocess.run(['bash', '-c', copy], cwd=work, check=True)
        sim, run = start.split(' & ')
        self.run_argv = _argv(run)
        self.logs = {name: (work / f'{name}.log').open('w') for name in ('sim', 'run')}
        self.sim = subprocess.Popen(_argv(sim), cwd=work, env=_env(), stdout=self.logs['sim'],
                                    stderr=subprocess.STDOUT)
        self.node = subprocess.Popen(self.run_argv, cwd=work, env=_env(),
                                     stdout=self.logs['run'], stderr=subprocess.STDOUT)

    def log(self, name: str) -> str:
        self.logs[name].flush()
        return (self.work / f'{name}.log').read_text()

    def stop(self) -> None:
        for proc in (self.node, self.sim):
            if proc.poll() is None:
                proc.send_signal(signal.SIGINT)
        for proc in (self.node, self.sim):
            try:
                proc.wait(30)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(10)
        for handle in self.logs.values():
            handle.close()


def cli(cell: Cell, *args: str, timeout: float = 240.0) -> subprocess.CompletedProcess[str]:
    return subprocess.run(CLI + list(args), cwd=cell.work, env=_env(), capture_output=True,
                          text=True, timeout=timeout)


def eventually(check: Callable[[], Any], attempts: int, what: str) -> Any:
    """The first truthy result of ``check`` within ``attempts`` tries."""
    for _ in range(attempts):
        result = check()
        if result:
            return result
        time.sleep(0.5)
    raise AssertionError(f'{what}: not after {attempts} attempts')


@pytest.fixture(scope='module')
def cell(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Cell]:
    c = Cell(tmp_path_factory.mktemp('recipe'))
    try:
        # the node answers once it is up (skills compiled); the CLI waits 5 s per try
        def up() -> bool:
            assert c.node.poll() is None, c.log('run')
            return cli(c, 'param', 'list').returncode == 0
        eventually(up, 40, 'the controller did not answer ' + c.log('run')[-2000:])
        yield c
    finally:
        c.stop()


def _documents(text: str) -> list[Any]:
    assert text.endswith('---\n'), text[-200:]
    return [yaml.safe_load(doc) for doc in text.split('---\n')[:-1]]


def _controller_status(cell: Cell) -> dict[str, str]:
    out = cli(cell, 'echo', '~/status', '--count', '1')
    assert out.returncode == 0, out.stderr
    docs = _documents(out.stdout)
    assert len(docs) == 1                           # --count 1: exactly one message
    status = {s['name']: s for s in docs[0]['status']}
    return {kv['key']: kv['value'] for kv in status[f'{NODE[1:]}: controller']['values']}


def test_recipe_runs_the_initial_skill_from_your_own_folder(cell: Cell) -> None:
    initial = next(a.split(':=')[1] for a in cell.run_argv if a.startswith('initial_skill:='))
    folder = next(a.split(':=')[1] for a in cell.run_argv if a.startswith('skills_folder:='))
    got = cli(cell, 'param', 'get', 'skills_folder')
    assert (got.returncode, got.stdout.strip()) == (0, folder)
    # the initial skill of the recipe is the one running, as ~/status reports it
    eventually(lambda: _controller_status(cell).get('skill') == initial, 10,
               f'~/status never showed {initial} running')
    # every skill file copied into the folder was loaded: its tunables are parameters
    names = cli(cell, 'param', 'list').stdout.split()
    for path in sorted((cell.work / folder).glob('*.yaml')):
        skill = yaml.safe_load(path.read_text())['skill']
        assert any(n.startswith(f'{skill}.') for n in names), (skill, names)


def test_activate_a_skill_and_see_its_event(cell: Cell) -> None:
    echo = subprocess.Popen(CLI + ['echo', '~/events'], cwd=cell.work, env=_env(),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    lines: list[str] = []
    errors: list[str] = []
    for stream, sink in ((echo.stdout, lines), (echo.stderr, errors)):
        threading.Thread(target=lambda s=stream, k=sink: k.extend(iter(s.readline, '')),
                         daemon=True).start()
    try:
        eventually(lambda: any(line.startswith(f'echo {NODE}/events (std_msgs/msg/String)')
                               for line in errors), 120, f'echo did not start: {errors}')
        wanted = 'data: activated_keep_tool_vertical\n'
        for _ in range(3):   # an event published before the node matched the echo is lost
            out = cli(cell, 'call', 'activate', 'keep_tool_vertical')
            assert out.returncode == 0, out.stderr
            assert 'keep_tool_vertical active' in out.stdout
            try:
                eventually(lambda: wanted in lines, 20, 'event')
                break
            except AssertionError:
                continue
        assert wanted in lines, ''.join(lines[-20:])
        assert lines[lines.index(wanted) + 1] == '---\n'
    finally:
        echo.send_signal(signal.SIGINT)
        echo.wait(60)
    assert echo.returncode == 0, errors


def test_a_skill_the_node_lacks_is_named_with_the_ones_it_has(cell: Cell) -> None:
    out = cli(cell, 'call', 'activate', 'no_such_skill')
    assert out.returncode == 2
    assert f'service {NODE}/skills/no_such_skill/activate not available' in out.stderr
    assert 'keep_tool_vertical' in out.stderr and 'move_to_point' in out.stderr


def test_set_a_tunable_and_read_it_back(cell: Cell) -> None:
    out = cli(cell, 'param', 'set', 'move_to_point.goal_z', '0.3')
    assert out.returncode == 0, out.stderr
    assert cli(cell, 'param', 'get', 'move_to_point.goal_z').stdout.strip() == '0.3'
    out = cli(cell, 'param', 'set', 'move_to_point.goal_z', '0.35')
    assert out.returncode == 0, out.stderr
    assert cli(cell, 'param', 'get', 'move_to_point.goal_z').stdout.strip() == '0.35'


def test_refused_values_give_exit_1_with_the_reason(cell: Cell) -> None:
    before = cli(cell, 'param', 'get', 'move_to_point.goal_z').stdout.strip()
    out = cli(cell, 'param', 'set', 'move_to_point.goal_z', '40.0')     # outside its range
    assert out.returncode == 1 and 'out of range' in out.stderr, out
    out = cli(cell, 'param', 'set', 'move_to_point.goal_z', '3')        # an integer
    assert out.returncode == 1 and 'of type double' in out.stderr and '3.0' in out.stderr, out
    out = cli(cell, 'param', 'set', 'rate_hz', '100.0')                 # a start-up parameter
    assert out.returncode == 1 and 'read at configure' in out.stderr, out
    assert cli(cell, 'param', 'get', 'move_to_point.goal_z').stdout.strip() == before
    out = cli(cell, 'param', 'get', 'no_such_parameter')
    assert out.returncode == 1 and 'no_such_parameter' in out.stderr


def _flatten(tree: dict[str, Any], prefix: str = '') -> list[str]:
    names = []
    for key, value in tree.items():
        if isinstance(value, dict):
            names += _flatten(value, f'{prefix}{key}.')
        else:
            names.append(prefix + key)
    return names


def test_param_list_lists_the_nodes_parameters(cell: Cell) -> None:
    out = cli(cell, 'param', 'list')
    assert out.returncode == 0, out.stderr
    names = out.stdout.split()
    assert names == sorted(names)
    # every parameter of the recipe's parameters file, and the node's own ones
    params = yaml.safe_load((ROOT / 'config' / 'controller.yaml').read_text())
    expected = _flatten(params['/**']['ros__parameters'])
    expected += ['skills_folder', 'initial_skill', 'activate_skill', 'robot_description_file',
                 'joint_names', 'use_sim_time']
    assert not set(expected) - set(names), set(expected) - set(names)
    watchdog = cli(cell, 'param', 'list', 'watchdog').stdout.split()
    assert watchdog and all(n.startswith('watchdog.') for n in watchdog)
    assert set(watchdog) == {n for n in names if n.startswith('watchdog.')}


def test_a_new_skill_file_is_loaded_by_reload(cell: Cell) -> None:
    folder = cell.work / 'my_cell' / 'skills'
    assert not folder.is_symlink() and not folder.parent.is_symlink()
    text = (folder / 'move_to_point.yaml').read_text()
    assert re.search(r'^skill: move_to_point\b', text, flags=re.M)
    (folder / 'my_move.yaml').write_text(
        re.sub(r'^skill: move_to_point\b', 'skill: my_move', text, flags=re.M))
    out = cli(cell, 'call', 'reload', '--timeout', '30')
    assert out.returncode == 0, out.stderr
    assert 'my_move' in out.stdout
    out = eventually(lambda: (r := cli(cell, 'call', 'activate', 'my_move')).returncode == 0
                     and r, 3, 'my_move did not activate')
    assert 'my_move active' in out.stdout


def test_echo_joint_states_of_a_best_effort_publisher(cell: Cell) -> None:
    # the simulator publishes /joint_states best effort: a reliable reader would never match
    out = cli(cell, 'echo', '/joint_states', '--count', '2')
    assert out.returncode == 0, out.stderr
    docs = _documents(out.stdout)
    assert len(docs) == 2
    for doc in docs:
        assert doc['name'] == [f'joint_{i}' for i in range(1, 7)]
        assert len(doc['position']) == 6 and all(isinstance(v, float) for v in doc['position'])
    assert 'sensor_msgs/msg/JointState' in out.stderr


def test_unknown_node_or_topic_gives_exit_2_with_a_hint(cell: Cell) -> None:
    out = cli(cell, 'param', 'list', '--node', '/nobody_here', '--timeout', '2')
    assert out.returncode == 2
    assert 'no node /nobody_here' in out.stderr
    assert f'ROS_DOMAIN_ID={DOMAIN}' in out.stderr and NODE in out.stderr   # what it did see
    out = cli(cell, 'echo', '/no_such_topic', '--timeout', '2')
    assert out.returncode == 2 and 'no publisher on /no_such_topic' in out.stderr
    out = cli(cell, 'echo', str(Path.home() / 'status'), '--timeout', '2')  # shell-expanded ~
    assert out.returncode == 2 and "'~/status'" in out.stderr


def test_hold(cell: Cell) -> None:
    out = cli(cell, 'call', 'hold')
    if out.returncode == 2 and 'not available' in out.stderr:
        pytest.skip('the node has no ~/hold service yet (built-in hold added by another change)')
    assert out.returncode == 0, out.stderr

    def held() -> bool:
        got = cli(cell, 'echo', '~/command', '--count', '1')
        return got.returncode == 0 and all(v == 0.0 for v in _documents(got.stdout)[0]['data'])
    eventually(held, 10, 'the command did not go to zero after hold')
    out = cli(cell, 'call', 'activate', 'move_to_point')
    assert out.returncode == 0, out.stderr


def test_the_node_stops_cleanly_after_all_this(cell: Cell) -> None:
    """Clients came and went (one echo was ended by SIGINT); the node still shuts down with
    exit code 0 (its shutdown once failed on a reader that never acknowledged)."""
    cell.node.send_signal(signal.SIGINT)
    assert cell.node.wait(60) == 0, cell.log('run')[-3000:]
    assert 'zero command sent' in cell.log('run')
