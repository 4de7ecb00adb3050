"""Evaluate a demo run: summary.json, summary.md and PNG plots from what the run left behind.

Sources, all in the demo's output folder:
- steps.json: the sequencer's step times and outcome;
- sim_truth.npz: the simulator's true state at 100 Hz (not the noisy measurements);
- bag/: the controller's rosbag2 (status with the watchdog's view, events, commands), read
  with rosbags;
- demo_times.json: when the demo told the controller to stop (after HOLD_WATCH_S of hold).

The plan ends in the controller's hold: after its last step the controller must report hold
(event ``holding``, ``skill: hold`` on ~/status), the last command before the demo stopped the
controller must be exactly zero (the shutdown's own zero commands, recorded after it, do not
count), and the simulator's true joint positions must stay put once the zero command is in
force.

The separation criterion is checked on the true state, independently of the watchdog's own
numbers: the monitored points are recomputed from the true joint positions, their speed toward
the operator by finite differences, and S_p from the ISO/TS 15066 formula at that speed.
One clock everywhere (summary, plots, and the sequencer's log the demo prints): seconds since
the plan started (the sequencer's start, ``t0_wall`` in steps.json); nothing before it is shown.
The one criterion counted in simulated time (seating) counts simulated seconds from that same
instant.
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..model.kinematics import RobotModel
from ..nodes.common import config_dir
from ..runtime.watchdog_setup import DEFAULTS, monitored_points
from ..safety.separation import SeparationParams, protective_distance

STANDOFF = 0.008          # m, the plan's stand-off
SETTLE = 1.0              # s at the start of following excluded from the RMS (convergence)
SEAT_LIMIT = 20.0         # s of simulated time
STANDOFF_RMS_LIMIT = 0.0005
MOVING = 0.001            # m/s: a monitored point faster than this counts as moving
#: s after the ``holding`` event from which every ~/status must say hold (a status built by an
#: earlier tick may still be on its way; the status thread publishes it off the tick)
HOLD_STATUS_GRACE = 0.1
#: s after the first zero command for it to be in force in the simulator (its command latency
#: is far below this)
HOLD_SETTLE = 0.1
#: rad: the true joints may move this much once the zero command is in force; the simulator is
#: kinematic and integrates exactly, so zero velocity leaves them exactly where they are
HOLD_STILL_LIMIT = 1e-9


@dataclass
class Status:
    time: np.ndarray
    skill: list[str]
    state: list[str]
    speed_scale: np.ndarray
    min_separation: np.ndarray
    protective_distance: np.ndarray
    rows: list[dict[str, str]]
    reason: list[str]


def _read_bag(bag: Path, t0: float) -> tuple[Status, list[tuple[float, str]],
                                              list[tuple[float, float]]]:
    """(status, events, commands): ~/status, the rows of ~/rows (matched to it by header
    stamp: the node stamps both of one status period alike), ~/events, and ~/command as (time,
    largest absolute joint velocity). Bags from before ~/rows carry the rows in ~/status
    ('<node>: rows', keys '<row>.<what>')."""
    from rosbags.highlevel import AnyReader
    from rosbags.typesys import Stores, get_typestore
    times, skills, states, scale, sep, prot, rows = [], [], [], [], [], [], []
    reasons: list[str] = []
    events: list[tuple[float, str]] = []
    commands: list[tuple[float, float]] = []
    row_sets: dict[tuple[int, int], dict[str, str]] = {}
    status_stamps: list[tuple[int, int]] = []
    with AnyReader([bag], default_typestore=get_typestore(Stores.ROS2_JAZZY)) as reader:
        wanted = [c for c in reader.connections if c.topic.endswith(('/status', '/events',
                                                                     '/rows', '/command'))]
        for conn, stamp, raw in reader.messages(connections=wanted):
            msg = reader.deserialize(raw, conn.msgtype)
            t = stamp * 1e-9 - t0
            if conn.topic.endswith('/events'):
                events.append((t, msg.data))
                continue
            if conn.topic.endswith('/command'):
                data = np.asarray(msg.data, dtype=float)
                commands.append((t, float(np.abs(data).max()) if data.size else 0.0))
                continue
            key = (msg.header.stamp.sec, msg.header.stamp.nanosec)
            if conn.topic.endswith('/rows'):
                row_sets[key] = {f'{s.name.partition(": ")[2]}.{kv.key}': kv.value
                                 for s in msg.status for kv in s.values}
                continue
            by_name = {s.name.rpartition(': ')[2]: {kv.key: kv.value for kv in s.values}
                       for s in msg.status}
            ctrl, wd = by_name.get('controller', {}), by_name.get('watchdog', {})
            times.append(t)
            skills.append(ctrl.get('skill', ''))
            states.append(wd.get('state', ''))
            reasons.append(wd.get('reason', ''))
            scale.append(float(wd.get('speed_scale', 'nan')))
            sep.append(float(wd.get('min_separation', 'nan')))
            prot.append(float(wd.get('protective_distance', 'nan')))
            rows.append(by_name.get('rows', {}))
            status_stamps.append(key)
    if row_sets:
        rows = [row_sets.get(key, {}) for key in status_stamps]
    return Status(np.array(times), skills, states, np.array(scale), np.array(sep),
                  np.array(prot), rows, reasons), events, commands


def ended_in_hold(plan_end: float | None, stop: float | None, events: list[tuple[float, str]],
                  status: Status | None, commands: list[tuple[float, float]],
                  t: np.ndarray, q: np.ndarray) -> dict[str, Any]:
    """After the plan (plan clock, s): the hold event, the status, the last command before the
    controller was stopped, and the true joint motion once the zero command was in force."""
    result: dict[str, Any] = {'passed': False, 'holding_at_s': None,
                              'statuses_after_hold': 0, 'statuses_not_hold': 0,
                              'last_command_max_abs': None, 'true_joint_motion_rad': None,
                              'still_samples': 0}
    if plan_end is None or stop is None:
        result['why'] = 'no plan end or no stop time'
        return result
    # events are stamped a little after the sequencer saw the step end; 50 ms of clock slack
    held = [tt for tt, name in events if name == 'holding' and tt >= plan_end - 0.05]
    if not held:
        result['why'] = 'no holding event after the plan'
        return result
    hold_at = held[0]
    result['holding_at_s'] = round(hold_at, 3)
    if status is not None:
        after = [i for i, tt in enumerate(status.time) if hold_at + HOLD_STATUS_GRACE < tt < stop]
        result['statuses_after_hold'] = len(after)
        result['statuses_not_hold'] = sum(status.skill[i] != 'hold' for i in after)
    before_stop = [(tt, v) for tt, v in commands if tt < stop]
    if before_stop:
        result['last_command_max_abs'] = before_stop[-1][1]
    zero = [tt for tt, v in before_stop if tt >= hold_at and v == 0.0]
    if zero:
        still = (t >= zero[0] + HOLD_SETTLE) & (t < stop)
        result['still_samples'] = int(still.sum())
        if still.any():
            ref = q[still][0]
            result['true_joint_motion_rad'] = float(np.abs(q[still] - ref).max())
    result['passed'] = bool(
        result['statuses_after_hold'] > 0 and result['statuses_not_hold'] == 0
        and result['last_command_max_abs'] == 0.0 and result['still_samples'] >= 10
        and result['true_joint_motion_rad'] is not None
        and result['true_joint_motion_rad'] <= HOLD_STILL_LIMIT)
    return result


def _true_separation(truth: Any, sim_time: np.ndarray) -> dict[str, np.ndarray]:
    """Separation, directed speed and S_p from the true state (independent of the watchdog)."""
    model = RobotModel.from_urdf(config_dir() / 'robots' / 'six_axis_arm.urdf')
    points = monitored_points(model, DEFAULTS['tool_link'], DEFAULTS['link_radius'],
                              DEFAULTS['tool_radius'])
    fn = model.points_function([(p.link, p.offset) for p in points])
    radii = np.array([p.radius for p in points])
    q = truth['q']
    person = truth['operator']
    positions = np.array([np.array(fn(qi)[0]) for qi in q])           # (n, 3, k)
    dt = np.gradient(sim_time)                 # the simulator's own step, not wall-clock jitter
    velocity = np.gradient(positions, axis=0) / dt[:, None, None]      # (n, 3, k)
    gap = person[:, :, None] - positions                                # towards the person
    dist = np.linalg.norm(gap, axis=1)
    separation = dist - radii[None, :]
    toward = np.maximum(0.0, (velocity * gap).sum(axis=1) / np.maximum(dist, 1e-9))
    params = SeparationParams()
    required = np.vectorize(lambda v: protective_distance(v, params))(toward)
    closest = np.argmin(separation - required, axis=1)
    rows = np.arange(len(sim_time))
    speed = np.linalg.norm(velocity, axis=1).max(axis=1)
    return {'separation': separation.min(axis=1), 'margin': (separation - required).min(axis=1),
            'required': required[rows, closest], 'speed': speed,
            'standstill': np.full(len(sim_time), protective_distance(0.0, params))}


def evaluate(out: Path) -> dict[str, Any]:
    steps = json.loads((out / 'steps.json').read_text()) if (out / 'steps.json').exists() \
        else {'outcome': 'no report', 'steps': [], 't0_wall': None, 'reason': ''}
    truth = dict(np.load(out / 'sim_truth.npz'))
    t0 = steps.get('t0_wall') or float(truth['wall_time'][0])
    t = truth['wall_time'] - t0
    status, events, commands = _read_bag(out / 'bag', t0) if (out / 'bag').exists() \
        else (None, [], [])
    step_times = {s['name']: (s['started_s'], s['ended_s']) for s in steps['steps']}

    # seating: when (since the plan started) and how much simulated time that took
    seated = np.flatnonzero(truth['seated'])
    seat_at = float(t[seated[0]]) if seated.size else None
    seat_sim = (float(truth['time'][seated[0]]) - _sim_time_at(0.0, t, truth['time'])
                if seated.size else None)
    # simulated time the watchdog held the arm before it was seated (stale data on a busy
    # machine, a person): the seating criterion judges the skill, so that time is not counted
    seat_held = (held_time(0.0, seat_at, status, t, truth['time'])
                 if seat_at is not None and status is not None else 0.0)
    seat_moving = seat_sim - seat_held if seat_sim is not None else None

    # following: true stand-off of the tool tip and the sensors' true ranges
    follow = step_times.get('follow_flange')
    standoff: dict[str, Any] = {'samples': 0}
    if follow and follow[1] is not None:
        during = (t >= follow[0]) & (t <= follow[1])
        settle_end = settling_end(follow[0], follow[1],
                                  status.time if status is not None else np.zeros(0),
                                  status.state if status is not None else [])
        settled = (t >= settle_end) & (t <= follow[1])
        err = truth['tool_standoff'][settled] - STANDOFF
        ranges = truth['true_ranges'][during]
        lo, hi = float(truth['sensor_min']), float(truth['sensor_max'])
        standoff = {
            'samples': int(settled.sum()),
            'settle_excluded_s': SETTLE,
            'settled_from_s': settle_end,
            'rms_error_mm': float(np.sqrt(np.mean(err ** 2)) * 1000) if err.size else None,
            'max_abs_error_mm': float(np.abs(err).max() * 1000) if err.size else None,
            'sensor_range_mm': [lo * 1000, hi * 1000],
            'sensor_min_mm': [float(v) * 1000 for v in ranges.min(axis=0)] if ranges.size else [],
            'sensor_max_mm': [float(v) * 1000 for v in ranges.max(axis=0)] if ranges.size else [],
            'all_sensors_in_range': bool(ranges.size and np.isfinite(ranges).all()
                                         and (ranges >= lo).all() and (ranges <= hi).all()),
        }

    sep = _true_separation(truth, truth['time'])
    moving = sep['speed'] > MOVING
    violations = moving & (sep['margin'] < 0)
    # a transition before the plan started (start-up) is shown at 0, the plan's first instant
    transitions = [(round(max(tt, 0.0), 3), name) for tt, name in events
                   if name.startswith('watchdog_')]
    # a stop for the operator: the watchdog's reason names the person, not stale data
    operator_stop = [tt for tt in person_stops(status)
                     if follow and follow[0] <= tt <= (follow[1] or 1e9)]
    resumed = [tt for tt, name in transitions
               if name in ('watchdog_normal', 'watchdog_reduced') and operator_stop
               and tt > operator_stop[0]]
    separation = {
        'min_separation_m': float(np.nanmin(sep['separation'])),
        'standstill_protective_distance_m': float(sep['standstill'][0]),
        'min_margin_while_moving_m': float(sep['margin'][moving].min()) if moving.any()
        else None,
        'samples_below_protective_distance_while_moving': int(violations.sum()),
        'watchdog_min_separation_m': float(np.nanmin(status.min_separation)) if status else None,
    }
    ends = [s['ended_s'] for s in steps['steps'] if s.get('ended_s') is not None]
    times_file = out / 'demo_times.json'
    stop = (json.loads(times_file.read_text())['controller_stop_wall'] - t0
            if times_file.exists() else None)
    hold = ended_in_hold(max(ends) if ends else None, stop, events, status, commands, t,
                         truth['q'])
    criteria = {
        'seated_within_20_s': {'passed': seat_moving is not None and seat_moving <= SEAT_LIMIT,
                               'value': seat_moving, 'limit': SEAT_LIMIT},
        'standoff_rms_at_most_0_5_mm': {
            'passed': standoff.get('rms_error_mm') is not None
            and standoff['rms_error_mm'] <= STANDOFF_RMS_LIMIT * 1000,
            'value': standoff.get('rms_error_mm'), 'limit': STANDOFF_RMS_LIMIT * 1000},
        'every_sensor_in_range_while_following': {
            'passed': bool(standoff.get('all_sensors_in_range')),
            'value': standoff.get('sensor_min_mm'), 'limit': standoff.get('sensor_range_mm')},
        'separation_never_below_protective_distance_while_moving': {
            'passed': not violations.any(), 'value': separation['min_margin_while_moving_m'],
            'limit': 0.0},
        'stopped_for_operator_then_resumed_and_finished': {
            'passed': bool(operator_stop) and bool(resumed) and steps['outcome'] == 'done',
            'value': {'stopped_at_s': operator_stop, 'resumed_at_s': resumed[:1],
                      'plan': steps['outcome']}},
        'ended_in_hold': {
            'passed': hold['passed'],
            'value': {'holding_at_s': hold['holding_at_s'],
                      'last_command': hold['last_command_max_abs'],
                      'true_joint_motion_rad': hold['true_joint_motion_rad']},
            'limit': HOLD_STILL_LIMIT},
    }
    labels = {
        'seated_within_20_s': 'gear seated within 20 s of simulated time after the plan '
                              'started, time the watchdog held the arm not counted (s)',
        'standoff_rms_at_most_0_5_mm': 'stand-off error RMS <= 0.5 mm while following (mm)',
        'every_sensor_in_range_while_following': 'every sensor in its range while following '
                                                 '(minimum per sensor, mm)',
        'separation_never_below_protective_distance_while_moving':
            'separation never below S_p while moving (smallest margin, m)',
        'stopped_for_operator_then_resumed_and_finished':
            'stopped for the operator, resumed, finished',
        'ended_in_hold': 'after the plan: the controller holds (event and ~/status), the last '
                         'command before it was stopped is exactly zero, the true joints stand '
                         'still (largest motion, rad)',
    }
    for key, label in labels.items():
        criteria[key]['label'] = label
    summary = {
        'plan_outcome': steps['outcome'], 'plan_reason': steps.get('reason', ''),
        'steps': steps['steps'],
        'clock': 'seconds since the plan started',
        'seated': {'seated': seat_sim is not None, 'time_s': seat_at,
                   'simulated_time_s': seat_sim, 'held_s': seat_held,
                   'simulated_moving_time_s': seat_moving,
                   'event_time_s': next((tt for tt, n in events if n == 'seated'), None)},
        'following': standoff,
        'separation': separation,
        'watchdog_transitions': transitions,
        'after_plan': hold,
        'criteria': criteria,
    }
    summary['markers_frame'] = (marker_png(out / 'bag', t0, status, out / 'markers.png')
                                if (out / 'bag').exists() else None)
    (out / 'summary.json').write_text(json.dumps(summary, indent=2) + '\n')
    (out / 'summary.md').write_text(_markdown(summary))
    _plots(out, t, truth, status, step_times, sep)
    return summary


def marker_views(msg: Any) -> list[dict[str, Any]]:
    """A visualization_msgs/MarkerArray as plain values (plots.marker_figure's input)."""
    views = []
    for m in msg.markers:
        p, o, sc, c = m.pose.position, m.pose.orientation, m.scale, m.color
        views.append({'ns': m.ns, 'type': int(m.type), 'action': int(m.action), 'text': m.text,
                      'position': (p.x, p.y, p.z), 'orientation': (o.x, o.y, o.z, o.w),
                      'scale': (sc.x, sc.y, sc.z), 'colour': (c.r, c.g, c.b, c.a),
                      'points': [(q.x, q.y, q.z) for q in m.points]})
    return views


def _closest_approach(msg: Any) -> float:
    """Smallest distance from a drawn person to a monitored sphere's surface in one
    MarkerArray (inf without people or spheres), from the markers themselves."""
    spheres = [(np.array([m.pose.position.x, m.pose.position.y, m.pose.position.z]),
                m.scale.x / 2.0) for m in msg.markers if m.ns == 'monitored_spheres']
    people = [np.array([m.pose.position.x, m.pose.position.y, m.pose.position.z])
              for m in msg.markers if m.ns == 'people']
    return min((float(np.linalg.norm(p - c)) - r for p in people for c, r in spheres),
               default=float('inf'))


def marker_png(bag: Path, t0: float, status: Status | None, path: Path) -> dict[str, Any] | None:
    """One frame of the recorded ~/markers as a PNG: the frame in which a person came
    closest to a monitored sphere after the plan started (measured on the drawn markers), else
    the last frame. None when no frame was recorded."""
    from rosbags.highlevel import AnyReader
    from rosbags.typesys import Stores, get_typestore

    from .plots import marker_figure, save
    best: tuple[float, float, Any] | None = None
    last: tuple[float, Any] | None = None
    frames = 0
    with AnyReader([bag], default_typestore=get_typestore(Stores.ROS2_JAZZY)) as reader:
        conns = [c for c in reader.connections if c.topic.endswith('/markers')]
        for conn, stamp, raw in reader.messages(connections=conns):
            t = stamp * 1e-9 - t0
            if t < 0.0:
                continue
            msg = reader.deserialize(raw, conn.msgtype)
            frames += 1
            last = (t, msg)
            gap = _closest_approach(msg)
            if np.isfinite(gap) and (best is None or gap < best[0]):
                best = (gap, t, msg)
    if last is None:
        return None
    if best is not None:
        gap, t, msg = best
        why = f'a person nearest a monitored sphere: {gap:.3f} m from its surface'
    else:
        (t, msg), why = last, 'the last frame; no person drawn'
    views = marker_views(msg)
    states = sorted({v['text'] for v in views if v['ns'] == 'monitored_spheres'})
    skill = next((sk for tt, sk in zip(status.time, status.skill) if tt >= t), '') \
        if status is not None else ''
    title = (f'~/markers, one frame at {t:.2f} s since the plan started\n({why})\n'
             f'watchdog {", ".join(states) or "unknown"}; skill {skill or "none"}')
    save(marker_figure(views, title), path)
    return {'time_s': round(t, 3), 'file': path.name, 'markers': len(views), 'why': why,
            'frames_recorded': frames}


def _markdown(s: dict[str, Any]) -> str:
    lines = ['# Demo summary: gearbox assembly cell', '',
             f"Plan: **{s['plan_outcome']}** ({s['plan_reason']})", '',
             '| step | skill | outcome | started (s) | duration (s) | paused (s) |',
             '|---|---|---|---|---|---|']
    for st in s['steps']:
        dur = '-' if st['duration_s'] is None else f"{st['duration_s']:.2f}"
        lines.append(f"| {st['name']} | {st['skill']} | {st['outcome']} | "
                     f"{st['started_s']:.2f} | {dur} | {st['paused_s']:.2f} |")
    f = s['following']
    seat = s['seated']
    lines += ['', 'Times are seconds since the plan started.', '',
              f"Seated: {seat['seated']}" + ('' if not seat['seated'] else
                                             f" at {_short(seat['time_s'])} s "
                                             f"({_short(seat['simulated_time_s'])} s of simulated "
                                             'time)'),
              'Stand-off while following (true, tool axis, the first '
              f"{f.get('settle_excluded_s')} s in which the arm could move excluded): RMS "
              f"{f.get('rms_error_mm') or float('nan'):.3f} mm, max "
              f"{f.get('max_abs_error_mm') or float('nan'):.3f} mm; sensor ranges min "
              f"{_mm(f.get('sensor_min_mm'))}, max {_mm(f.get('sensor_max_mm'))} "
              f"(allowed {_mm(f.get('sensor_range_mm'))})",
              f"Separation (true state): min {s['separation']['min_separation_m']:.3f} m; S_p at "
              f"standstill {s['separation']['standstill_protective_distance_m']:.3f} m; samples "
              'below S_p while moving: '
              f"{s['separation']['samples_below_protective_distance_while_moving']}",
              'Watchdog transitions: ' + ', '.join(f'{n[9:]} at {t:.2f} s'
                                                  for t, n in s['watchdog_transitions'])]
    frame = s.get('markers_frame')
    lines += ['', f"Markers: one frame of ~/markers at {frame['time_s']:.2f} s ({frame['why']}) "
                  f"in {frame['file']}" if frame else 'Markers: no ~/markers in the bag']
    lines += ['', '| criterion | passed | value |', '|---|---|---|']
    for name, c in s['criteria'].items():
        lines.append(f"| {c.get('label', name)} | {'yes' if c['passed'] else 'NO'} | "
                     f"{_short(c['value'])} |")
    return '\n'.join(lines) + '\n'


def settling_end(start: float, end: float, status_time: np.ndarray, states: list[str]) -> float:
    """When the first SETTLE seconds of following during which the watchdog let the arm move
    (normal or reduced on ~/status) are over; without status, SETTLE after ``start``.

    A watchdog hold right after the step began must not use up the settling time: the tool is
    still coming down to the stand-off when it is held."""
    if not len(status_time):
        return start + SETTLE
    moving = np.array([s in ('normal', 'reduced') for s in states], dtype=bool)
    edges = np.append(status_time, np.inf)
    total = 0.0
    for k in range(len(status_time)):
        a, b = max(edges[k], start), min(edges[k + 1], end)
        if b <= a or not moving[k]:
            continue
        if total + (b - a) >= SETTLE:
            return float(a + (SETTLE - total))
        total += b - a
    return float(end)


def held_time(start: float, end: float, status: Status, wall: np.ndarray,
              sim: np.ndarray) -> float:
    """Simulated time in [start, end] (plan clock) that the watchdog held the arm (state
    stopped or stopping on ~/status; each status sample's state holds until the next one)."""
    held = 0.0
    for i, state in enumerate(status.state):
        if state not in ('stopped', 'stopping'):
            continue
        a = max(start, float(status.time[i]))
        b = min(end, float(status.time[i + 1]) if i + 1 < len(status.time) else end)
        if b > a:
            held += _sim_time_at(b, wall, sim) - _sim_time_at(a, wall, sim)
    return held


def person_stops(status: Status | None) -> list[float]:
    """Plan-clock times at which the watchdog entered stopped because a person was too close
    (its reason on ~/status names the person; stale data or a failed solve do not count)."""
    if status is None:
        return []
    out = []
    for i, state in enumerate(status.state):
        entered = state == 'stopped' and (i == 0 or status.state[i - 1] != 'stopped'
                                          or 'person too close' not in status.reason[i - 1])
        if entered and 'person too close' in status.reason[i]:
            out.append(round(float(status.time[i]), 3))
    return out


def _sim_time_at(wall_s: float, wall: np.ndarray, sim: np.ndarray) -> float:
    """Simulated time at a wall-clock instant (linear before the first sample)."""
    if wall_s <= wall[0]:
        return float(sim[0] - (wall[0] - wall_s))
    return float(np.interp(wall_s, wall, sim))


def _short(value: Any) -> str:
    """Readable table cell: floats to 4 significant digits, lists and dicts likewise."""
    if isinstance(value, float):
        return f'{value:.4g}'
    if isinstance(value, list):
        return '[' + ', '.join(_short(v) for v in value) + ']'
    if isinstance(value, dict):
        return ', '.join(f'{k}: {_short(v)}' for k, v in value.items())
    return str(value)


def _mm(values: Any) -> str:
    return '-' if not values else '[' + ', '.join(f'{v:.1f}' for v in values) + '] mm'


def _reduced_speed(out: Path) -> float:
    """The watchdog's reduced speed the run used (the demo keeps its parameters file)."""
    from ..transport.ros_args import load_params_file
    path = out / 'controller_params.yaml'
    if path.exists():
        for params in load_params_file(path).values():
            if 'watchdog.reduced_speed' in params:
                return float(params['watchdog.reduced_speed'])
    return float(DEFAULTS['reduced_speed'])


def _plots(out: Path, t: np.ndarray, truth: dict[str, np.ndarray], status: Status | None,
           steps: dict[str, tuple[float, float | None]], sep: dict[str, np.ndarray]) -> None:
    from .plots import save
    for name, fig in demo_figures(t, truth, status, steps, sep, _reduced_speed(out)).items():
        save(fig, out / name)


def _gaps_as_nan(time: np.ndarray, values: np.ndarray, gap: float) -> tuple[np.ndarray, np.ndarray]:
    """Insert a NaN where consecutive samples are more than ``gap`` apart, so that a line is
    not drawn across a stretch without data (another skill was active)."""
    if len(time) < 2:
        return time, values
    cut = np.flatnonzero(np.diff(time) > gap) + 1
    return np.insert(time, cut, np.nan), np.insert(values, cut, np.nan)


def demo_figures(t: np.ndarray, truth: dict[str, np.ndarray], status: Status | None,
                 steps: dict[str, tuple[float, float | None]], sep: dict[str, np.ndarray],
                 reduced_speed: float) -> dict[str, Any]:
    """The demo's figures (matplotlib Figures by file name), all on the plan's clock."""
    from .plots import (LOG_FLOOR, above_floor, figure, label_steps, legend_outside,
                        shade_steps, state_panel, styles, title_above_steps)
    spans = [(name, a, b) for name, (a, b) in steps.items() if b is not None]
    end = max([float(t[-1]) if len(t) else 0.0] + [b for _, _, b in spans])
    shown = t >= 0.0                       # nothing before the plan started
    ts = t[shown]
    xlabel = 'time since the plan started (s)'
    figures: dict[str, Any] = {}

    def frame(ax: Any) -> None:
        shade_steps(ax, spans)
        ax.set_xlim(0.0, end)
        ax.grid(alpha=0.3)

    # -- joint velocity commands
    fig, (ax,) = figure(1, height=4.2)
    frame(ax)
    n = truth['command'].shape[1]
    for j, style in zip(range(n), styles(n)):
        ax.plot(ts, truth['command'][shown, j], lw=0.9, label=f'joint_{j + 1}', **style)
    ax.set(xlabel=xlabel, ylabel='commanded joint velocity (rad/s)')
    legend_outside(ax)
    rows = label_steps(ax, spans)
    title_above_steps(ax, 'Joint velocity commands as the simulator received them', rows)
    figures['joint_velocities.png'] = fig

    # -- constraint errors and slacks: two panels per skill, one line per constraint
    if status is not None and len(status.time):
        keep = status.time >= 0.0
        series: dict[str, dict[str, tuple[list[float], list[float], list[float]]]] = {}
        for tt, skill, row in zip(status.time[keep], np.array(status.skill)[keep],
                                  np.array(status.rows, dtype=object)[keep]):
            if not skill:
                continue
            per: dict[str, tuple[float, float]] = {}
            for key, value in row.items():
                base, _, what = key.rpartition('.')
                if what not in ('error', 'slack'):
                    continue
                con = base.split('[')[0]
                e, sl = per.get(con, (0.0, 0.0))
                v = abs(float(value))
                per[con] = (max(e, v), sl) if what == 'error' else (e, max(sl, v))
            for con, (e, sl) in per.items():
                times, errs, slacks = series.setdefault(skill, {}).setdefault(con, ([], [], []))
                times.append(tt)
                errs.append(e)
                slacks.append(sl)
        skills = list(series)
        if skills:
            period = float(np.median(np.diff(status.time))) if len(status.time) > 1 else 0.1
            fig, axes = figure(2 * len(skills), height=4.2 * len(skills),
                               ratios=[1.0] * (2 * len(skills)))
            for k, skill in enumerate(skills):
                palette = styles(len(series[skill]))
                for what, ax in (('error', axes[2 * k]), ('slack', axes[2 * k + 1])):
                    frame(ax)
                    ax.set_yscale('log')
                    for (con, (times, errs, slacks)), style in zip(series[skill].items(),
                                                                    palette):
                        values = np.array(errs if what == 'error' else slacks)
                        x, y = _gaps_as_nan(np.array(times), above_floor(values), 3.0 * period)
                        label = con if np.isfinite(y).any() else f'{con} (always <= {LOG_FLOOR:g})'
                        ax.plot(x, y, lw=1.0, label=label, **style)
                    unit = 'unit of its function' + (' / s' if what == 'slack' else '')
                    ax.set_ylabel(f'{skill}\n|{what}| ({unit})', fontsize=8)
                    legend_outside(ax, fontsize=7, title=f'{skill}: {what}',
                                   title_fontsize=7)
            axes[-1].set_xlabel(xlabel)
            rows = label_steps(axes[0], spans)
            title_above_steps(axes[0], 'Errors and slacks of the active skill from ~/rows: '
                              'largest row of each constraint\n(values <= '
                              f'{LOG_FLOOR:g}, e.g. a bound not reached, are not drawn)', rows)
            figures['constraints.png'] = fig

    # -- following: true ranges and stand-off
    follow = steps.get('follow_flange')
    if follow and follow[1] is not None:
        during = (t >= max(0.0, follow[0] - 0.5)) & (t <= follow[1] + 0.3)
        fig, axes = figure(2, height=7.0, ratios=[1.3, 1.0])
        ax = axes[0]
        names = ('range_left', 'range_right', 'range_front')
        palette = styles(len(names))
        for k, (name, style) in enumerate(zip(names, palette)):
            ax.plot(t[during], truth['true_ranges'][during, k] * 1000, lw=1, label=name, **style)
        ax.plot(t[during], truth['tool_standoff'][during] * 1000, color='black', lw=1.5,
                label='tool tip stand-off')
        ax.axhline(STANDOFF * 1000, color='black', ls=':', label='8 mm target')
        low, high = float(truth['sensor_min']) * 1000, float(truth['sensor_max']) * 1000
        span = [t[during][0], t[during][-1]] if during.any() else [0.0, 1.0]
        ax.plot(span + [np.nan] + span, [low, low, np.nan, high, high], color='tab:red',
                ls='--', lw=0.8, label='sensor measuring range')
        ax.set(ylabel='distance to the flange (mm)', ylim=(0, high + 5))
        legend_outside(ax)
        ax.set_title('Following the flange: true sensor ranges and tool stand-off')
        ax = axes[1]
        settle_end = settling_end(follow[0], follow[1],
                                  status.time if status is not None else np.zeros(0),
                                  list(status.state) if status is not None else [])
        settled = (t >= settle_end) & (t <= follow[1])
        err = (truth['tool_standoff'] - STANDOFF) * 1000
        ax.plot(t[during], err[during], color='black', lw=1.0, label='stand-off error')
        ax.axhline(0.0, color='black', ls=':', lw=0.8, label='no error')
        rms = float(np.sqrt(np.mean(err[settled] ** 2))) if settled.any() else float('nan')
        ax.set(ylabel='stand-off - 8 mm (mm)', xlabel=xlabel)
        if settled.any():
            bound = max(1.0, 1.2 * float(np.abs(err[settled]).max()))
            ax.set_ylim(-bound, bound)
        ax.set_title(f'stand-off error, RMS {rms:.3f} mm after the first {SETTLE:g} s the arm '
                     'could move (grey: settling, not counted)', fontsize=9)
        legend_outside(ax)
        for a in axes:
            a.axvspan(follow[0], settle_end, color='0.88', lw=0, zorder=0)
            a.set_xlim(t[during][0] if during.any() else 0.0,
                       t[during][-1] if during.any() else 1.0)
            a.grid(alpha=0.3)
        figures['standoff.png'] = fig

    # -- separation, speed, speed scale, watchdog state
    fig, axes = figure(4, height=9.5, ratios=[3.0, 2.0, 1.4, 1.2])
    ax = axes[0]
    frame(ax)
    ax.plot(ts, sep['separation'][shown], color='tab:blue', lw=1.2,
            label='separation (true state)')
    ax.plot(ts, sep['required'][shown], color='tab:red', lw=1,
            label='S_p at the actual speed (true state)')
    ax.plot(ts, sep['standstill'][shown], color='tab:red', ls=':', lw=1, label='S_p at standstill')
    if status is not None and len(status.time):
        keep = status.time >= 0.0
        ax.plot(status.time[keep], status.min_separation[keep], color='tab:cyan', ls='none',
                marker='.', ms=2, label="watchdog's min separation")
    ax.set(ylabel='distance (m)', ylim=(0, 3))
    legend_outside(ax)
    ax = axes[1]
    frame(ax)
    ax.plot(ts, sep['speed'][shown], color='tab:gray', lw=0.9,
            label='fastest monitored point (true state)')
    ax.axhline(reduced_speed, color='tab:purple', ls='--', lw=1,
               label=f'reduced speed ({reduced_speed * 1000:g} mm/s)')
    ax.set(ylabel='speed (m/s)')
    legend_outside(ax)
    ax = axes[2]
    frame(ax)
    if status is not None and len(status.time):
        keep = status.time >= 0.0
        ax.plot(status.time[keep], status.speed_scale[keep], color='tab:green', lw=1.2,
                label="watchdog's speed scale")
        legend_outside(ax)
    ax.set(ylabel='speed scale\n(fraction, 1 = full)', ylim=(-0.05, 1.1))
    ax = axes[3]
    frame(ax)
    if status is not None and len(status.time):
        keep = status.time >= 0.0
        state_panel(ax, status.time[keep], list(np.array(status.state)[keep]))
    else:
        ax.set_ylabel('watchdog state')
    ax.set_xlabel(xlabel)
    rows = label_steps(axes[0], spans)
    title_above_steps(axes[0], 'Operator separation against the protective separation '
                      'distance S_p, and what the watchdog did', rows)
    figures['separation.png'] = fig
    return figures


__all__ = ['demo_figures', 'evaluate']
