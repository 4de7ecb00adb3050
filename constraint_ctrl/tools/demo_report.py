"""Evaluate a demo run: summary.json, summary.md and PNG plots from what the run left behind.

Sources, all in the demo's output folder:
- steps.json: the sequencer's step times and outcome;
- sim_truth.npz: the simulator's true state at 100 Hz (not the noisy measurements);
- bag/: the controller's rosbag2 (status with the watchdog's view, events), read with rosbags.

The separation criterion is checked on the true state, independently of the watchdog's own
numbers: the monitored points are recomputed from the true joint positions, their speed toward
the operator by finite differences, and S_p from the ISO/TS 15066 formula at that speed.
Times are wall-clock seconds since the plan started.
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


@dataclass
class Status:
    time: np.ndarray
    skill: list[str]
    state: list[str]
    speed_scale: np.ndarray
    min_separation: np.ndarray
    protective_distance: np.ndarray
    rows: list[dict[str, str]]


def _read_bag(bag: Path, t0: float) -> tuple[Status, list[tuple[float, str]]]:
    from rosbags.highlevel import AnyReader
    from rosbags.typesys import Stores, get_typestore
    times, skills, states, scale, sep, prot, rows = [], [], [], [], [], [], []
    events: list[tuple[float, str]] = []
    with AnyReader([bag], default_typestore=get_typestore(Stores.ROS2_JAZZY)) as reader:
        wanted = [c for c in reader.connections
                  if c.topic.endswith('/status') or c.topic.endswith('/events')]
        for conn, stamp, raw in reader.messages(connections=wanted):
            msg = reader.deserialize(raw, conn.msgtype)
            t = stamp * 1e-9 - t0
            if conn.topic.endswith('/events'):
                events.append((t, msg.data))
                continue
            ctrl, wd, row = ({kv.key: kv.value for kv in s.values} for s in msg.status)
            times.append(t)
            skills.append(ctrl.get('skill', ''))
            states.append(wd.get('state', ''))
            scale.append(float(wd.get('speed_scale', 'nan')))
            sep.append(float(wd.get('min_separation', 'nan')))
            prot.append(float(wd.get('protective_distance', 'nan')))
            rows.append(row)
    return Status(np.array(times), skills, states, np.array(scale), np.array(sep),
                  np.array(prot), rows), events


def _true_separation(truth: Any, t: np.ndarray) -> dict[str, np.ndarray]:
    """Separation, directed speed and S_p from the true state (independent of the watchdog)."""
    model = RobotModel.from_urdf(config_dir() / 'robots' / 'six_axis_arm.urdf')
    points = monitored_points(model, DEFAULTS['tool_link'], DEFAULTS['link_radius'],
                              DEFAULTS['tool_radius'])
    fn = model.points_function([(p.link, p.offset) for p in points])
    radii = np.array([p.radius for p in points])
    q = truth['q']
    person = truth['operator']
    positions = np.array([np.array(fn(qi)[0]) for qi in q])           # (n, 3, k)
    dt = np.gradient(t)
    velocity = np.gradient(positions, axis=0) / dt[:, None, None]      # (n, 3, k)
    gap = person[:, :, None] - positions                                # towards the person
    dist = np.linalg.norm(gap, axis=1)
    separation = dist - radii[None, :]
    toward = np.maximum(0.0, (velocity * gap).sum(axis=1) / np.maximum(dist, 1e-9))
    params = SeparationParams()
    required = np.vectorize(lambda v: protective_distance(v, params))(toward)
    closest = np.argmin(separation - required, axis=1)
    rows = np.arange(len(t))
    speed = np.linalg.norm(velocity, axis=1).max(axis=1)
    return {'separation': separation.min(axis=1), 'margin': (separation - required).min(axis=1),
            'required': required[rows, closest], 'speed': speed,
            'standstill': np.full(len(t), protective_distance(0.0, params))}


def evaluate(out: Path) -> dict[str, Any]:
    steps = json.loads((out / 'steps.json').read_text()) if (out / 'steps.json').exists() \
        else {'outcome': 'no report', 'steps': [], 't0_wall': None, 'reason': ''}
    truth = dict(np.load(out / 'sim_truth.npz'))
    t0 = steps.get('t0_wall') or float(truth['wall_time'][0])
    t = truth['wall_time'] - t0
    status, events = _read_bag(out / 'bag', t0) if (out / 'bag').exists() else (None, [])
    step_times = {s['name']: (s['started_s'], s['ended_s']) for s in steps['steps']}

    # seating (simulated time of the first seated sample)
    seated = np.flatnonzero(truth['seated'])
    seat_sim = float(truth['time'][seated[0]]) if seated.size else None

    # following: true stand-off of the tool tip and the sensors' true ranges
    follow = step_times.get('follow_flange')
    standoff: dict[str, Any] = {'samples': 0}
    if follow and follow[1] is not None:
        during = (t >= follow[0]) & (t <= follow[1])
        settled = (t >= follow[0] + SETTLE) & (t <= follow[1])
        err = truth['tool_standoff'][settled] - STANDOFF
        ranges = truth['true_ranges'][during]
        lo, hi = float(truth['sensor_min']), float(truth['sensor_max'])
        standoff = {
            'samples': int(settled.sum()),
            'settle_excluded_s': SETTLE,
            'rms_error_mm': float(np.sqrt(np.mean(err ** 2)) * 1000) if err.size else None,
            'max_abs_error_mm': float(np.abs(err).max() * 1000) if err.size else None,
            'sensor_range_mm': [lo * 1000, hi * 1000],
            'sensor_min_mm': [float(v) * 1000 for v in ranges.min(axis=0)] if ranges.size else [],
            'sensor_max_mm': [float(v) * 1000 for v in ranges.max(axis=0)] if ranges.size else [],
            'all_sensors_in_range': bool(ranges.size and np.isfinite(ranges).all()
                                         and (ranges >= lo).all() and (ranges <= hi).all()),
        }

    sep = _true_separation(truth, t)
    moving = sep['speed'] > MOVING
    violations = moving & (sep['margin'] < 0)
    transitions = [(round(tt, 3), name) for tt, name in events if name.startswith('watchdog_')]
    stopped = [tt for tt, name in transitions if name == 'watchdog_stopped']
    resumed = [tt for tt, name in transitions
               if name in ('watchdog_normal', 'watchdog_reduced') and stopped and tt > stopped[0]]
    operator_stop = [tt for tt in stopped if follow and follow[0] <= tt <= (follow[1] or 1e9)]
    separation = {
        'min_separation_m': float(np.nanmin(sep['separation'])),
        'standstill_protective_distance_m': float(sep['standstill'][0]),
        'min_margin_while_moving_m': float(sep['margin'][moving].min()) if moving.any()
        else None,
        'samples_below_protective_distance_while_moving': int(violations.sum()),
        'watchdog_min_separation_m': float(np.nanmin(status.min_separation)) if status else None,
    }
    criteria = {
        'seated_within_20_s': {'passed': seat_sim is not None and seat_sim <= SEAT_LIMIT,
                               'value': seat_sim, 'limit': SEAT_LIMIT},
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
    }
    labels = {
        'seated_within_20_s': 'gear seated within 20 s of simulated time (s)',
        'standoff_rms_at_most_0_5_mm': 'stand-off error RMS <= 0.5 mm while following (mm)',
        'every_sensor_in_range_while_following': 'every sensor in its range while following '
                                                 '(minimum per sensor, mm)',
        'separation_never_below_protective_distance_while_moving':
            'separation never below S_p while moving (smallest margin, m)',
        'stopped_for_operator_then_resumed_and_finished':
            'stopped for the operator, resumed, finished',
    }
    for key, label in labels.items():
        criteria[key]['label'] = label
    summary = {
        'plan_outcome': steps['outcome'], 'plan_reason': steps.get('reason', ''),
        'steps': steps['steps'],
        'seated': {'seated': seat_sim is not None, 'simulated_time_s': seat_sim,
                   'event_time_s': next((tt for tt, n in events if n == 'seated'), None)},
        'following': standoff,
        'separation': separation,
        'watchdog_transitions': transitions,
        'criteria': criteria,
    }
    (out / 'summary.json').write_text(json.dumps(summary, indent=2) + '\n')
    (out / 'summary.md').write_text(_markdown(summary))
    _plots(out, t, truth, status, step_times, sep)
    return summary


def _markdown(s: dict[str, Any]) -> str:
    lines = ['# Demo summary: gearbox assembly cell', '',
             f"Plan: **{s['plan_outcome']}** ({s['plan_reason']})", '',
             '| step | skill | outcome | duration (s) | paused (s) |', '|---|---|---|---|---|']
    for st in s['steps']:
        dur = '-' if st['duration_s'] is None else f"{st['duration_s']:.2f}"
        lines.append(f"| {st['name']} | {st['skill']} | {st['outcome']} | {dur} | "
                     f"{st['paused_s']:.2f} |")
    f = s['following']
    lines += ['', f"Seated: {s['seated']['seated']} at {_short(s['seated']['simulated_time_s'])} s "
              '(simulated time)',
              f"Stand-off while following (true, tool axis, first {f.get('settle_excluded_s')} s "
              f"excluded): RMS {f.get('rms_error_mm') or float('nan'):.3f} mm, max "
              f"{f.get('max_abs_error_mm') or float('nan'):.3f} mm; sensor ranges min "
              f"{_mm(f.get('sensor_min_mm'))}, max {_mm(f.get('sensor_max_mm'))} "
              f"(allowed {_mm(f.get('sensor_range_mm'))})",
              f"Separation (true state): min {s['separation']['min_separation_m']:.3f} m; S_p at "
              f"standstill {s['separation']['standstill_protective_distance_m']:.3f} m; samples "
              'below S_p while moving: '
              f"{s['separation']['samples_below_protective_distance_while_moving']}",
              'Watchdog transitions: ' + ', '.join(f'{n[9:]} at {t:.2f} s'
                                                  for t, n in s['watchdog_transitions']), '',
              '| criterion | passed | value |', '|---|---|---|']
    for name, c in s['criteria'].items():
        lines.append(f"| {c.get('label', name)} | {'yes' if c['passed'] else 'NO'} | "
                     f"{_short(c['value'])} |")
    return '\n'.join(lines) + '\n'


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


def _plots(out: Path, t: np.ndarray, truth: dict[str, np.ndarray], status: Status | None,
           steps: dict[str, tuple[float, float | None]], sep: dict[str, np.ndarray]) -> None:
    import matplotlib
    matplotlib.use('Agg')
    import matplotlib.pyplot as plt

    def shade(ax: Any) -> None:
        for i, (name, (a, b)) in enumerate(steps.items()):
            if b is None:
                continue
            ax.axvspan(a, b, color='0.92' if i % 2 else '0.97', zorder=0)
            ax.text((a + b) / 2, 1.0, name.replace('_', ' '), transform=ax.get_xaxis_transform(),
                    ha='center', va='bottom', fontsize=7, rotation=0)

    fig, ax = plt.subplots(figsize=(11, 4))
    shade(ax)
    for j in range(truth['command'].shape[1]):
        ax.plot(t, truth['command'][:, j], lw=0.9, label=f'joint_{j + 1}')
    ax.set(xlabel='time since plan start (s)', ylabel='commanded velocity (rad/s)')
    ax.set_title('Joint velocity commands', pad=16)
    ax.legend(fontsize=8, ncol=6, loc='lower right')
    ax.grid(alpha=0.3)
    fig.tight_layout()
    fig.savefig(out / 'joint_velocities.png', dpi=90)
    plt.close(fig)

    if status is not None and len(status.time):
        fig, axes = plt.subplots(2, 1, figsize=(11, 7), sharex=True)
        series: dict[str, tuple[list[float], list[float], list[float]]] = {}
        for tt, skill, row in zip(status.time, status.skill, status.rows):
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
                times, errs, slacks = series.setdefault(f'{skill}: {con}', ([], [], []))
                times.append(tt)
                errs.append(e)
                slacks.append(sl)
        for label, (times, errs, slacks) in series.items():
            axes[0].semilogy(times, np.maximum(errs, 1e-9), '.', ms=2, label=label)
            axes[1].semilogy(times, np.maximum(slacks, 1e-9), '.', ms=2, label=label)
        for ax, what in zip(axes, ('|error| (task units)', '|slack| (task rate units)')):
            shade(ax)
            ax.set_ylabel(what)
            ax.grid(alpha=0.3, which='both')
        axes[0].set_title('Constraint errors and slacks of the active skill (largest row)',
                          pad=16)
        axes[1].set_xlabel('time since plan start (s)')
        axes[0].legend(fontsize=6, ncol=3, markerscale=4, loc='lower left')
        fig.tight_layout()
        fig.savefig(out / 'constraints.png', dpi=90)
        plt.close(fig)

    follow = steps.get('follow_flange')
    if follow and follow[1] is not None:
        during = (t >= follow[0] - 0.5) & (t <= follow[1] + 0.5)
        fig, ax = plt.subplots(figsize=(11, 4))
        for k, name in enumerate(('range_left', 'range_right', 'range_front')):
            ax.plot(t[during], truth['true_ranges'][during, k] * 1000, lw=1, label=name)
        ax.plot(t[during], truth['tool_standoff'][during] * 1000, 'k', lw=1.5,
                label='tool tip stand-off')
        ax.axhline(STANDOFF * 1000, color='k', ls=':', label='8 mm target')
        for bound in (truth['sensor_min'], truth['sensor_max']):
            ax.axhline(float(bound) * 1000, color='r', ls='--', lw=0.8)
        ax.axvspan(follow[0], follow[0] + SETTLE, color='0.9', label='settling (excluded)')
        ax.set(xlabel='time since plan start (s)', ylabel='distance to flange (mm)',
               ylim=(0, float(truth['sensor_max']) * 1000 + 5))
        ax.set_title('Following the flange: true sensor ranges and tool stand-off '
                     '(red: sensor measuring range)')
        ax.legend(fontsize=8, ncol=3)
        ax.grid(alpha=0.3)
        fig.tight_layout()
        fig.savefig(out / 'standoff.png', dpi=90)
        plt.close(fig)

    fig, axes = plt.subplots(2, 1, figsize=(11, 7), sharex=True)
    shade(axes[0])
    axes[0].plot(t, sep['separation'], 'b', lw=1.2, label='separation (true state)')
    axes[0].plot(t, sep['required'], 'r', lw=1, label='S_p at the actual speed (true state)')
    axes[0].plot(t, sep['standstill'], 'r:', lw=1, label='S_p at standstill')
    if status is not None and len(status.time):
        axes[0].plot(status.time, status.min_separation, 'c.', ms=2,
                     label="watchdog's min separation")
    axes[0].set(ylabel='distance (m)', ylim=(0, 3))
    axes[0].legend(fontsize=8, loc='upper right')
    axes[0].grid(alpha=0.3)
    axes[0].set_title('Operator separation against the protective separation distance', pad=16)
    shade(axes[1])
    if status is not None and len(status.time):
        axes[1].plot(status.time, status.speed_scale, 'g', lw=1.2, label='speed scale')
        codes = {'normal': 0.0, 'reduced': 0.33, 'stopping': 0.66, 'stopped': 1.0}
        axes[1].plot(status.time, [codes.get(s, np.nan) for s in status.state], 'k', lw=1,
                     drawstyle='steps-post', label='watchdog state (0 normal, 0.33 reduced, '
                     '0.66 stopping, 1 stopped)')
    axes[1].plot(t, sep['speed'] / max(float(sep['speed'].max()), 1e-9), color='0.5', lw=0.8,
                 label='fastest monitored point (normalised)')
    axes[1].set(xlabel='time since plan start (s)', ylabel='scale / state', ylim=(-0.05, 1.1))
    axes[1].legend(fontsize=8, loc='center right')
    axes[1].grid(alpha=0.3)
    fig.tight_layout()
    fig.savefig(out / 'separation.png', dpi=90)
    plt.close(fig)


__all__ = ['evaluate']
