"""Replay of the demo's own bag with the unchanged skill reproduces the recorded commands.

A short piece of the demo runs (simulator, controller with --record, sequencer as three
processes over DDS; plan: approach the shaft, seat the gear), then `constraint-ctrl replay`
re-runs seat_gear over the recorded joint states and wrist force, with the parameters file the
controller ran with. The recorded bag, read independently with rosbags, is the reference.

How close, and why not exactly (measured in one run on a busy 2-core machine: RMS difference
2.4 % of the RMS command, 53 % of the ticks identical to 1e-9, the largest single difference
0.01 rad/s = the skill's acceleration limit x one tick):
- tick alignment: the bag says when each sample arrived, not whether it arrived before or
  after the node took its snapshot; a 500 Hz force or joint sample logged while the node was
  computing is given to the replayed tick one tick early, so that tick answers one sample of
  sensor noise differently;
- the acceleration limits (the skill's 5 rad/s^2 and the watchdog's) bound each command
  relative to the previous one, so such a difference carries into the next few ticks, and the
  replay starts from a zero previous command where the node continued from the last command
  of the previous skill;
- the skill clock starts at the recorded activation tick and advances one tick per recorded
  command, as in the node, so time-based targets agree; start_value() agrees unless the
  activation tick itself was ambiguous;
- the watchdog's caps are the same code with the same parameters; the operator stays outside
  the cell in this piece, so they do not act.
The bounds below leave a factor of four to ten over that run. A changed gain must move the
commands much further than the alignment does (the replay can tell a change from noise).
"""
from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip('cyclonedds')
pytestmark = pytest.mark.integration
ROOT = Path(__file__).resolve().parents[2]
SKILL = ROOT / 'config' / 'skills' / 'seat_gear.yaml'
NODE = '/constraint_controller'

PLAN = """plan: replay_piece
description: The first two steps of the gearbox demo, for the replay test.
controller: /constraint_controller
steps:
  - name: approach_shaft
    skill: move_to_point
    set: {goal_x: 0.50, goal_y: -0.20, goal_z: 0.26, move_speed: 0.15}
    done_when: arrived
    timeout: 20
  - name: seat_gear
    skill: seat_gear
    done_when: seated
    timeout: 30
"""


@pytest.fixture(scope='module')
def run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp('replay_demo')
    plan = root / 'plan.yaml'
    plan.write_text(PLAN)
    out = root / 'demo'
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    env.pop('ROS_DOMAIN_ID', None)
    proc = subprocess.run([sys.executable, '-m', 'constraint_ctrl.cli', 'demo', '--out', str(out),
                           '--plan', str(plan)], cwd=ROOT, env=env, capture_output=True,
                          text=True, timeout=400)
    steps = json.loads((out / 'steps.json').read_text())
    assert steps['outcome'] == 'done', proc.stdout[-3000:] + proc.stderr[-3000:]
    assert (out / 'bag' / 'metadata.yaml').exists()
    return out


def _recorded(bag: Path) -> tuple[np.ndarray, np.ndarray, list[tuple[int, str]], int]:
    """Command log times and values and the events, read with rosbags directly."""
    from rosbags.highlevel import AnyReader
    from rosbags.typesys import Stores, get_typestore
    with AnyReader([bag], default_typestore=get_typestore(Stores.ROS2_JAZZY)) as reader:
        conns = {c.topic: c for c in reader.connections}
        times, values, events = [], [], []
        for conn, t, raw in reader.messages(connections=[conns[f'{NODE}/command'],
                                                         conns[f'{NODE}/events']]):
            msg = reader.deserialize(raw, conn.msgtype)
            if conn.topic.endswith('/events'):
                events.append((t, msg.data))
            else:
                times.append(t)
                values.append(np.array(msg.data))
        return np.array(times), np.array(values), events, int(reader.start_time)


def _replay(run: Path, out: Path, *extra: str) -> dict:
    from constraint_ctrl.cli import main
    code = main(['replay', str(run / 'bag'), '--skill', str(SKILL), '--params',
                 str(run / 'controller_params.yaml'), '--out', str(out), *extra])
    assert code == 0
    return json.loads((out / 'summary.json').read_text())


def test_replay_reproduces_the_recorded_commands(run: Path, tmp_path: Path) -> None:
    summary = _replay(run, tmp_path / 'same')
    times, values, events, start = _recorded(run / 'bag')
    activated = next(t for t, name in events if name == 'activated_seat_gear')
    first = int(np.searchsorted(times, activated, side='right')) - 1
    later = [t for t, name in events if name.startswith('activated_') and t > activated]
    last = (int(np.searchsorted(times, later[0], side='right')) - 2) if later else len(times) - 1
    # one replayed tick per recorded command of the skill's activation
    assert summary['ticks_compared'] == last - first + 1
    assert summary['solve_status'] == {'ok': summary['ticks_compared']}
    recorded = values[first:last + 1]
    rms_recorded = float(np.sqrt(np.mean(recorded ** 2)))
    print(f"replay of the demo bag: {summary['ticks_compared']} ticks, RMS difference "
          f"{summary['rms_difference']:.3g} = {summary['rms_difference'] / rms_recorded:.1%} of "
          f"the RMS command {rms_recorded:.3g} rad/s, max {summary['max_abs_difference']:.3g}, "
          f"identical to 1e-9: {summary['ticks_within']['1e-09']} ticks")
    assert rms_recorded > 0.005                          # the skill really moved the arm
    assert summary['rms_difference'] <= 0.1 * rms_recorded
    assert summary['ticks_within']['1e-09'] >= 0.1 * summary['ticks_compared']
    # the replay raises the skill's event where the node did (same recorded joint states)
    seated = [t for t, name in events if name == 'seated']
    replayed = [e['time_s'] for e in summary['events'] if e['event'] == 'seated']
    assert seated and replayed
    assert abs(replayed[0] - (seated[0] - start) * 1e-9) <= 0.05
    assert set(summary['watchdog_states']) == {'normal'}   # the operator stayed outside
    for name in ('commands.png', 'rows.png'):
        assert (tmp_path / 'same' / name).stat().st_size > 1000


def test_a_changed_gain_stands_out_from_the_alignment(run: Path, tmp_path: Path) -> None:
    same = _replay(run, tmp_path / 'same')
    changed = _replay(run, tmp_path / 'changed', '--set', 'press.gain=15')
    assert changed['rms_difference'] >= 5.0 * same['rms_difference']
