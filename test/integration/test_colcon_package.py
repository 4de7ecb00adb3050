"""`colcon build` of this package in a scratch workspace, then the install tree ROS 2 tools read.

The layout checked is the one `ros2 run`, `ros2 launch` and ament_index_python look up
(ROS 2 ament_python package layout: share/<pkg>/package.xml, the resource-index marker
share/ament_index/resource_index/packages/<pkg>, executables in lib/<pkg>). It works with
Debian's colcon (colcon-ros builds ament_python packages with plain setuptools; no ROS install
and no ament_package needed). Skipped where colcon or git is missing.
"""
from __future__ import annotations

import ast
import os
import shutil
import signal
import subprocess
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import pytest

pytestmark = pytest.mark.integration

ROOT = Path(__file__).resolve().parents[2]
PACKAGE = 'constraint_ctrl'
EXECUTABLES = ('controller_node', 'cell_simulator', 'task_sequencer', 'constraint-ctrl')
LAUNCH_FILES = ('controller.launch.py', 'demo.launch.py')


@dataclass(frozen=True)
class Installed:
    prefix: Path          # install/constraint_ctrl
    share: Path           # .../share/constraint_ctrl
    lib: Path             # .../lib/constraint_ctrl (where `ros2 run` looks)
    site_packages: Path
    sources: list[str]    # files of the package source, relative to its root


def package_sources() -> list[str]:
    """Files git knows about or would add (tracked plus untracked, not ignored) that exist."""
    if shutil.which('git') is None:
        pytest.skip('git is not on PATH: cannot list the package sources')
    done = subprocess.run(['git', '-C', str(ROOT), 'ls-files', '-z', '--cached', '--others',
                           '--exclude-standard'], capture_output=True, text=True, check=False)
    if done.returncode != 0:
        pytest.skip(f'{ROOT} is not a git work tree: {done.stderr.strip()}')
    return sorted(f for f in done.stdout.split('\0') if f and (ROOT / f).is_file())


@pytest.fixture(scope='module')
def installed(tmp_path_factory: pytest.TempPathFactory) -> Installed:
    if shutil.which('colcon') is None:
        pytest.skip('colcon is not on PATH (Debian/Ubuntu package: colcon)')
    sources = package_sources()
    ws = tmp_path_factory.mktemp('colcon_ws')
    pkg = ws / 'src' / PACKAGE
    for rel in sources:
        (pkg / rel).parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(ROOT / rel, pkg / rel)
    # colcon runs setup.py with its own interpreter; our venv must not leak into it.
    env = {k: v for k, v in os.environ.items() if k not in ('PYTHONPATH', 'VIRTUAL_ENV')}
    done = subprocess.run(['colcon', 'build', '--packages-select', PACKAGE], cwd=ws, env=env,
                          capture_output=True, text=True, timeout=180, check=False)
    assert done.returncode == 0, f'colcon build failed:\n{done.stdout}\n{done.stderr}'
    prefix = ws / 'install' / PACKAGE
    site = sorted(prefix.glob('lib/python3*/site-packages'))
    assert len(site) == 1, f'expected one site-packages under {prefix}/lib, found {site}'
    return Installed(prefix, prefix / 'share' / PACKAGE, prefix / 'lib' / PACKAGE, site[0],
                     sources)


def test_share_holds_manifest_launch_files_and_config(installed: Installed) -> None:
    for rel in ('package.xml', 'launch/controller.launch.py', 'launch/demo.launch.py',
                'config/controller.yaml', 'config/robots/six_axis_arm.urdf',
                'config/plans/gearbox_assembly.yaml', 'config/scenes/gearbox_cell.yaml'):
        assert (installed.share / rel).is_file(), f'share/{PACKAGE}/{rel} was not installed'
    assert sorted((installed.share / 'config' / 'skills').glob('*.yaml')), 'no skill installed'
    # Every config and launch file of the source tree must reach share/ (a new config
    # subfolder needs its own data_files line in setup.py).
    wanted = [r for r in installed.sources
              if (r.startswith('config/') and r.endswith(('.yaml', '.urdf')))
              or (r.startswith('launch/') and r.endswith('.launch.py'))]
    assert wanted, 'the source listing has no config or launch files'
    missing = [r for r in wanted if not (installed.share / r).is_file()]
    assert not missing, f'not installed into share/{PACKAGE}: {missing}'


def test_ament_index_marker_installed(installed: Installed) -> None:
    marker = (installed.prefix / 'share' / 'ament_index' / 'resource_index' / 'packages'
              / PACKAGE)
    assert marker.is_file(), f'{marker} missing: ament_index_python would not find {PACKAGE}'


@pytest.mark.parametrize('name', EXECUTABLES)
def test_executable_in_lib_package_folder(installed: Installed, name: str) -> None:
    path = installed.lib / name
    assert path.is_file(), f'{path} missing: `ros2 run {PACKAGE} {name}` would not find it'
    assert os.access(path, os.X_OK), f'{path} is not executable'


def _launch_file_references(path: Path) -> tuple[set[str], set[tuple[str, ...]]]:
    """(executable= names, constant tails of os.path.join(share, ...)) used in a launch file."""
    executables: set[str] = set()
    share_paths: set[tuple[str, ...]] = set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if not isinstance(node, ast.Call):
            continue
        for kw in node.keywords:
            if kw.arg == 'executable' and isinstance(kw.value, ast.Constant):
                executables.add(kw.value.value)
        func = node.func
        if isinstance(func, ast.Attribute) and func.attr == 'join' and \
                ast.unparse(func.value) == 'os.path' and len(node.args) > 1 and \
                all(isinstance(a, ast.Constant) for a in node.args[1:]):
            share_paths.add(tuple(a.value for a in node.args[1:]))
    return executables, share_paths


@pytest.mark.parametrize('launch_file', LAUNCH_FILES)
def test_launch_file_names_only_installed_things(installed: Installed, launch_file: str) -> None:
    executables, share_paths = _launch_file_references(installed.share / 'launch' / launch_file)
    assert executables or share_paths, f'{launch_file}: found no executable nor share path'
    for name in executables:
        assert (installed.lib / name).is_file(), \
            f'{launch_file} starts executable {name!r}, not installed in {installed.lib}'
    for parts in share_paths:
        assert installed.share.joinpath(*parts).is_file(), \
            f'{launch_file} uses share/{PACKAGE}/{"/".join(parts)}, which is not installed'


def _wait_until(predicate: Callable[[], bool], timeout_s: float) -> bool:
    end = time.monotonic() + timeout_s
    while time.monotonic() < end and not predicate():
        time.sleep(0.05)
    return predicate()


def test_installed_controller_node_starts_and_stops_cleanly(installed: Installed) -> None:
    """What the launch test checks on ROS, here over direct DDS with the installed entry point.

    The script's shebang is colcon's Python (no numpy here), so our interpreter runs it; the
    ROS arguments are the ones launch_ros appends for Node(name=..., parameters=[file]), plus a
    namespace unique to this run so that other DDS users on the machine cannot interfere. A
    ~/status sample proves the node spins (its timer starts in spin()) before SIGINT is sent.
    """
    pytest.importorskip('cyclonedds')
    from constraint_ctrl.transport.port import open_port
    env = {k: v for k, v in os.environ.items() if k != 'VIRTUAL_ENV'}
    env.update(PYTHONPATH=str(installed.site_packages), PYTHONUNBUFFERED='1')
    where = subprocess.run([sys.executable, '-c', 'import constraint_ctrl; '
                            'print(constraint_ctrl.__file__)'], env=env, cwd=installed.prefix,
                           capture_output=True, text=True, timeout=30, check=True)
    assert Path(where.stdout.strip()).is_relative_to(installed.site_packages), where.stdout
    cfg = installed.share / 'config'
    namespace = f'/colcon_check_{os.getpid()}'
    # Paths given explicitly: without ament_index_python the node's default config lookup
    # does not know this install prefix.
    cmd = [sys.executable, str(installed.lib / 'controller_node'), '--transport', 'dds',
           '--ros-args', '-r', '__node:=constraint_controller', '-r', f'__ns:={namespace}',
           '--params-file', str(cfg / 'controller.yaml'),
           '-p', f'robot_description_file:={cfg / "robots" / "six_axis_arm.urdf"}',
           '-p', f'skills_folder:={cfg / "skills"}']
    peer = open_port('dds', f'colcon_check_peer_{os.getpid()}', ['--ros-args'])
    status: list[object] = []
    peer.create_subscription(peer.types.DiagnosticArray,
                             f'{namespace}/constraint_controller/status', status.append,
                             'default')
    threading.Thread(target=peer.spin, daemon=True).start()
    proc = subprocess.Popen(cmd, env=env, cwd=installed.prefix, stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, text=True)
    lines: list[str] = []
    assert proc.stdout is not None
    reader = threading.Thread(target=lambda: lines.extend(proc.stdout), daemon=True)
    reader.start()
    try:
        assert _wait_until(lambda: any('constraint_controller ready' in x for x in lines)
                           or proc.poll() is not None, 60.0), ''.join(lines)
        assert any('constraint_controller ready' in x for x in lines), ''.join(lines)
        assert _wait_until(lambda: bool(status), 30.0), \
            f'no ~/status sample from the installed node:\n{"".join(lines)}'
        proc.send_signal(signal.SIGINT)
        proc.wait(20)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(5)
        peer.shutdown()
    reader.join(5)
    output = ''.join(lines)
    assert proc.returncode == 0, output
    assert 'Traceback' not in output, output
