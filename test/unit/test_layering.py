"""The core never imports a middleware: checked in a fresh interpreter."""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
CORE = ['constraint_ctrl.model.kinematics', 'constraint_ctrl.skill.compile',
        'constraint_ctrl.solve.qp', 'constraint_ctrl.safety.watchdog',
        'constraint_ctrl.runtime.loop', 'constraint_ctrl.runtime.library',
        'constraint_ctrl.plan.machine', 'constraint_ctrl.sim.world',
        'constraint_ctrl.tools.check', 'constraint_ctrl.tools.simulate']
CORE += ['constraint_ctrl.frames.buffer', 'constraint_ctrl.frames.messages']


def test_core_imports_neither_rclpy_nor_cyclonedds() -> None:
    code = ('import importlib, json, sys\n'
            f'for name in {CORE!r}: importlib.import_module(name)\n'
            'print(json.dumps(sorted(m for m in sys.modules '
            "if m.split('.')[0] in ('rclpy', 'cyclonedds', 'rosbags', 'launch', 'launch_ros'))))")
    out = subprocess.run([sys.executable, '-c', code], cwd=ROOT, capture_output=True, text=True,
                         check=True, env={'PYTHONPATH': str(ROOT), 'PATH': '/usr/bin:/bin'})
    assert json.loads(out.stdout.strip().splitlines()[-1]) == []


def test_the_check_would_see_a_middleware_import() -> None:
    # the same probe does report a middleware module when one is imported (the check can fail)
    code = ('import json, sys, cyclonedds\n'
            "print(json.dumps(sorted(m for m in sys.modules if m.split('.')[0] == 'cyclonedds')))")
    out = subprocess.run([sys.executable, '-c', code], cwd=ROOT, capture_output=True, text=True,
                         check=True)
    assert 'cyclonedds' in json.loads(out.stdout.strip().splitlines()[-1])
