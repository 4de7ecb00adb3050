"""The controller's load log names one failed skill file per line (issue 10, section 3).

The node is started as its own process on the DDS transport with a skills folder holding one
good and two broken files; its stderr log must carry each failure on a line of its own (with
the file's located error), so a log reader (or grep) sees every failed file at once.
"""
from __future__ import annotations

import os
import random
import shutil
import signal
import subprocess
import sys
import threading
from pathlib import Path

import pytest

from constraint_ctrl.runtime.library import ReloadReport

ROOT = Path(__file__).resolve().parents[2]


def test_reload_report_log_lines_put_each_failure_on_its_own_line() -> None:
    report = ReloadReport(added=['b_skill', 'a_skill'], unchanged=['c_skill'],
                          failed={'z.yaml': 'z.yaml:3: robot: not found',
                                  'a.yaml': 'a.yaml:9: constraints[0].function: bad'})
    assert report.log_lines() == [
        'added: a_skill, b_skill; unchanged: c_skill; 2 file(s) failed to load:',
        'FAILED a.yaml: a.yaml:9: constraints[0].function: bad',
        'FAILED z.yaml: z.yaml:3: robot: not found',
    ]
    # the service reply keeps its single line
    assert '\n' not in report.summary() and report.summary().count('FAILED') == 2
    assert ReloadReport(added=['a']).log_lines() == ['added: a']
    assert ReloadReport().log_lines() == ['no skill files found']


@pytest.mark.integration
def test_node_start_up_log_lists_one_failed_file_per_line(tmp_path: Path) -> None:
    pytest.importorskip('cyclonedds')
    skills = tmp_path / 'skills'
    skills.mkdir()
    good = (ROOT / 'config' / 'skills' / 'move_to_point.yaml').read_text()
    (skills / 'move_to_point.yaml').write_text(
        good.replace('../robots/', str(ROOT / 'config' / 'robots') + '/'))
    (skills / 'broken_a.yaml').write_text('skill: broken_a\nrobot: nowhere.urdf\n')
    (skills / 'broken_b.yaml').write_text('skill: [\n')
    env = dict(os.environ, ROS_DOMAIN_ID=str(random.randint(100, 200)), PYTHONUNBUFFERED='1')
    node = subprocess.Popen(
        [sys.executable, '-m', 'constraint_ctrl.cli', 'run', '--transport', 'dds',
         '--ros-args', '-p', f'skills_folder:={skills}', '-p', 'people.sources:=[""]'],
        cwd=ROOT, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    lines: list[str] = []
    ready = threading.Event()

    def read() -> None:
        assert node.stderr is not None
        for line in node.stderr:
            lines.append(line.rstrip('\n'))
            if 'ready' in line:
                ready.set()

    reader = threading.Thread(target=read, daemon=True)
    reader.start()
    try:
        # a hang guard only (the node is ready in seconds); no timing is asserted
        assert ready.wait(300), '\n'.join(lines)
    finally:
        node.send_signal(signal.SIGINT)
        try:
            node.wait(60)
        except subprocess.TimeoutExpired:
            node.kill()
            node.wait()
        reader.join(10)
    failed = [line for line in lines if 'FAILED' in line]
    assert len(failed) == 2, '\n'.join(lines)
    assert all(line.count('FAILED') == 1 for line in failed)
    assert any('FAILED broken_a.yaml:' in line and 'broken_a.yaml:2: robot:' in line
               for line in failed), failed
    assert any('FAILED broken_b.yaml:' in line and 'not valid YAML' in line for line in failed)
    head = [line for line in lines if 'skills: added: move_to_point' in line]
    assert head and '2 file(s) failed to load' in head[0] and head[0].startswith('[WARN]')
    shutil.rmtree(tmp_path, ignore_errors=True)
