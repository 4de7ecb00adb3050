"""Mechanical checks of the plots a person reads (issue 10 item 5).

Every figure the tools save is caught at ``Figure.savefig`` and inspected before it is written:
- every panel with data has a y label with its unit in parentheses or brackets, or named
  (non-numeric) tick levels; the lowest panel has an x label with its unit;
- no two lines of one panel share colour, line style and marker;
- on a log axis no drawn value sits at or below the floor (values clipped up to the floor would
  be drawn as if they were data);
- a watchdog state is drawn on its own panel of named levels, never on a numeric axis;
- step labels above a panel never overlap;
- the demo's plots start at the plan's start: no negative times.
The rules are ours (issue 10); the checks read only matplotlib's public objects.
"""
from __future__ import annotations

import itertools
import re
from pathlib import Path

import numpy as np
import pytest

matplotlib = pytest.importorskip('matplotlib')
matplotlib.use('Agg')
from matplotlib.colors import to_hex  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
UNIT = re.compile(r'\([^()]*\S[^()]*\)|\[[^\[\]]*\S[^\[\]]*\]')
FLOOR = 1e-9
WATCHDOG_LEVELS = {'normal', 'reduced', 'stopping', 'stopped'}


@pytest.fixture
def saved(monkeypatch: pytest.MonkeyPatch) -> list[Figure]:
    figures: list[Figure] = []
    monkeypatch.setattr(Figure, 'savefig', lambda self, *a, **k: figures.append(self))
    return figures


def _numeric(text: str) -> bool:
    text = text.replace('\u2212', '-').replace('$', '').replace('\\mathdefault', '')
    text = text.strip('{}').strip()
    return bool(re.fullmatch(r'[-+0-9.eE^{}x\u00d7 ]*', text))


def _categorical(ax) -> bool:
    labels = [t.get_text() for t in ax.get_yticklabels() if t.get_text()]
    return bool(labels) and not any(_numeric(text) for text in labels)


def _data_lines(ax) -> list:
    return [line for line in ax.get_lines() if len(np.atleast_1d(line.get_xdata())) > 0]


def check_figure(fig: Figure, name: str, *, plan_clock: bool = False) -> list[str]:
    if not hasattr(fig.canvas, 'get_renderer'):     # pyplot detaches a closed figure's canvas
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        FigureCanvasAgg(fig)
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    problems: list[str] = []
    axes = [ax for ax in fig.axes if ax.get_visible()]
    with_data = [ax for ax in axes if _data_lines(ax) or ax.images]
    for k, ax in enumerate(with_data):
        where = f'{name} panel {k} ({ax.get_ylabel()!r})'
        ylabel = ax.get_ylabel()
        if not (UNIT.search(ylabel) or (ylabel and _categorical(ax))):
            problems.append(f'{where}: y label without a unit')
        seen = {}
        for line in _data_lines(ax):
            key = (to_hex(line.get_color()), str(line.get_linestyle()), str(line.get_marker()))
            if key in seen:
                problems.append(f'{where}: lines {seen[key]!r} and {line.get_label()!r} share '
                                f'colour and style {key}')
            seen[key] = line.get_label()
            y = np.asarray(line.get_ydata(), dtype=float)
            if ax.get_yscale() == 'log' and np.any(y[np.isfinite(y)] <= FLOOR):
                problems.append(f'{where}: {line.get_label()!r} draws values at or below '
                                f'{FLOOR:g} on a log axis (clipped values drawn as data)')
            if 'watchdog state' in str(line.get_label()).lower() and not (
                    _categorical(ax) and {t.get_text() for t in ax.get_yticklabels()}
                    >= WATCHDOG_LEVELS):
                problems.append(f'{where}: {line.get_label()!r} is drawn on a numeric axis '
                                'instead of its own panel of named levels')
            if plan_clock:
                x = np.asarray(line.get_xdata(), dtype=float)
                if np.any(x[np.isfinite(x)] < 0.0):
                    problems.append(f'{where}: {line.get_label()!r} has negative times')
        if plan_clock and ax.get_xlim()[0] < 0.0:
            problems.append(f'{where}: the time axis starts before the plan ({ax.get_xlim()})')
        boxes = [(t.get_text(), t.get_window_extent(renderer)) for t in ax.texts
                 if t.get_visible() and t.get_text()]
        for (a, box_a), (b, box_b) in itertools.combinations(boxes, 2):
            if box_a.overlaps(box_b):
                problems.append(f'{where}: labels {a!r} and {b!r} overlap')
    if with_data:
        lowest = min(with_data, key=lambda ax: ax.get_position().y0)
        if not UNIT.search(lowest.get_xlabel()):
            problems.append(f'{name}: the lowest panel has no x label with a unit '
                            f'({lowest.get_xlabel()!r})')
    return problems


# --------------------------------------------------------------------------- the demo

def _demo_inputs():
    from constraint_ctrl.tools.demo_report import Status
    t = np.arange(-1.5, 12.0, 0.01)           # the simulator starts before the plan
    n = len(t)
    rng = np.random.default_rng(3)
    truth = {
        'command': 0.2 * np.sin(np.outer(t, np.arange(1, 7)) * 0.7),
        'true_ranges': 0.008 + 0.001 * rng.standard_normal((n, 3)),
        'tool_standoff': 0.008 + 0.0003 * np.sin(t),
        'sensor_min': np.array(0.002), 'sensor_max': np.array(0.040),
    }
    # short steps side by side, so that their names cannot all sit on one row
    steps = {'approach_shaft': (0.0, 2.0), 'seat_gear': (2.0, 2.4), 'lift_off': (2.4, 2.7),
             'above_flange': (2.7, 3.0), 'down_to_flange': (3.0, 3.3),
             'follow_flange': (3.3, 10.0), 'retreat': (10.0, 11.5)}
    ts = np.arange(-1.0, 11.5, 0.02)
    skills, rows, states = [], [], []
    for tt in ts:
        if 2.0 <= tt < 2.4:
            skill = 'seat_gear'
            row = {'press.error': f'{1e-3 * (1 + np.sin(tt)):.6g}', 'press.slack': '0',
                   'tool_down[0].error': '2e-05', 'tool_down[0].slack': '1e-07'}
        elif 3.3 <= tt < 10.0:
            skill = 'follow_flange'
            row = {f'c{i}.error': f'{10.0 ** -(i % 8) * (1.5 + np.cos(tt)):.6g}'
                   for i in range(12)}                  # more constraints than colours
            row.update({f'c{i}.slack': '0' if i % 3 == 0 else '1e-4' for i in range(12)})
            row['left_in_range.error'] = '0'            # an inactive bound: exactly zero
        elif tt >= 0.0:
            skill = 'move_to_point'
            row = {'tip_on_line[0].error': '1e-3', 'tip_on_line[0].slack': '1e-6',
                   'above_bench.error': '0', 'above_bench.slack': '0'}
        else:
            skill, row = '', {}
        skills.append(skill)
        rows.append(row)
        states.append('stopped' if 6.0 <= tt < 7.0 else 'reduced' if 5.0 <= tt < 6.0
                      else 'normal')
    status = Status(ts, skills, states, np.where(np.array(states) == 'normal', 1.0, 0.5),
                    np.full(len(ts), 1.5), np.full(len(ts), 0.49), rows,
                    ['person too close' if s == 'stopped' else '' for s in states])
    sep = {'separation': 2.0 - 0.1 * t, 'margin': np.full(n, 1.0),
           'required': np.full(n, 0.5), 'speed': np.abs(np.sin(t)) * 0.2,
           'standstill': np.full(n, 0.488)}
    return t, truth, status, steps, sep


def test_demo_plots_follow_the_rules(saved: list[Figure], tmp_path: Path) -> None:
    from constraint_ctrl.tools import demo_report
    t, truth, status, steps, sep = _demo_inputs()
    demo_report._plots(tmp_path, t, truth, status, steps, sep)
    assert len(saved) == 4          # joint velocities, constraints, stand-off, separation
    problems = [p for i, fig in enumerate(saved)
                for p in check_figure(fig, f'demo figure {i}', plan_clock=True)]
    assert not problems, '\n'.join(problems)
    # the watchdog state has a panel of its own with the named levels
    assert any({t.get_text() for t in ax.get_yticklabels()} >= WATCHDOG_LEVELS
               for fig in saved for ax in fig.axes)


def test_step_labels_are_staggered_not_dropped(saved: list[Figure], tmp_path: Path) -> None:
    """Every step inside the time axis keeps its name (staggering, not leaving names out)."""
    from constraint_ctrl.tools import demo_report
    t, truth, status, steps, sep = _demo_inputs()
    demo_report._plots(tmp_path, t, truth, status, steps, sep)
    names = {text.get_text() for text in saved[0].axes[0].texts}
    assert {name.replace('_', ' ') for name in steps} <= names


# ----------------------------------------------------------------------- simulate

def test_simulation_plots_follow_the_rules(saved: list[Figure], tmp_path: Path) -> None:
    from constraint_ctrl.skill.compile import compile_skill
    from constraint_ctrl.skill.loader import load_skill
    from constraint_ctrl.tools.plots import plot_simulation
    from constraint_ctrl.tools.simulate import run
    skill = compile_skill(load_skill(ROOT / 'config' / 'skills' / 'keep_tool_vertical.yaml'))
    trace = run(skill, 0.2, 0.002)
    plot_simulation(skill, trace, tmp_path)
    assert len(saved) == 3
    problems = [p for i, fig in enumerate(saved) for p in check_figure(fig, f'simulate {i}')]
    assert not problems, '\n'.join(problems)


# ------------------------------------------------------------------------- replay

def test_replay_plots_follow_the_rules(saved: list[Figure], tmp_path: Path) -> None:
    from constraint_ctrl.tools.plots import plot_replay
    from constraint_ctrl.tools.replay import RecordedRows, ReplayTrace
    n, rows = 400, 13
    t = np.linspace(3.0, 4.0, n)
    recorded = 0.1 * np.sin(np.outer(t, np.arange(1, 7)))
    command = recorded.copy()
    command[::7] += 1e-3                            # a few ticks differ, most match exactly
    error = np.abs(np.sin(np.outer(t, np.arange(rows)))) * 1e-3
    error[:, 0] = 0.0                               # a row that is never violated
    names = tuple(f'c{i}' for i in range(rows))
    trace = ReplayTrace(time=t, command=command, recorded=recorded, error=error,
                        slack=error * 0.1, state=['normal'] * (n // 2) + ['reduced'] * (n // 2),
                        speed_scale=np.ones(n), status=['ok'] * n, row_names=names,
                        constraints={name: [i] for i, name in enumerate(names)}, events=[],
                        js_matched=n)
    recorded_rows = RecordedRows(t[::20], {f'c{i}': {'error': error[::20, i],
                                                     'slack': error[::20, i] * 0.1}
                                           for i in range(rows)},
                                 ['normal'] * 10 + ['stopped'] * 10)
    plot_replay(trace, recorded_rows, [f'joint_{j}' for j in range(1, 7)], 'demo_skill',
                tmp_path)
    assert len(saved) == 2
    problems = [p for i, fig in enumerate(saved) for p in check_figure(fig, f'replay {i}')]
    assert not problems, '\n'.join(problems)


def test_the_checks_catch_a_bad_figure() -> None:
    """The checker itself fails a figure that breaks each rule (it can fail)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    fig = Figure()
    FigureCanvasAgg(fig)
    ax = fig.subplots()
    ax.semilogy([-1, 0, 1], np.maximum([0.0, 1e-3, 0.0], 1e-9), color='r', label='a')
    ax.plot([0, 1], [1, 2], color='r', label='b')
    ax.plot([0, 1], [0, 1], color='k', label='watchdog state')
    ax.text(0.5, 0.5, 'step one')
    ax.text(0.5, 0.5, 'step two')
    ax.set_ylabel('speed')
    problems = '\n'.join(check_figure(fig, 'bad', plan_clock=True))
    for expected in ('without a unit', 'share colour', 'on a log axis', 'numeric axis',
                     'negative times', 'overlap', 'no x label'):
        assert expected in problems, (expected, problems)


def test_marker_figure_follows_the_rules(saved: list[Figure], tmp_path: Path) -> None:
    """The demo's marker frame (markers.png) from a MarkerArray the node's builder made."""
    import numpy as np
    from constraint_ctrl.model.kinematics import RobotModel
    from constraint_ctrl.nodes.markers import MarkerBuilder, MarkerJob, SkillShapes
    from constraint_ctrl.runtime.watchdog_setup import build_watchdog
    from constraint_ctrl.safety.watchdog import PersonSample, WatchdogInput
    from constraint_ctrl.skill.compile import compile_skill
    from constraint_ctrl.skill.loader import load_skill
    from constraint_ctrl.solve.qp import SkillSolver
    from constraint_ctrl.tools.demo_report import marker_views
    from constraint_ctrl.tools.plots import marker_figure, save
    from constraint_ctrl.transport.dds_types import types_for

    class Port:
        types = types_for('jazzy')

    q = np.array([0.0, 0.0415, 0.6889, 0.0, 0.8404, 3.1416])
    model = RobotModel.from_urdf(ROOT / 'config' / 'robots' / 'six_axis_arm.urdf')
    wd = build_watchdog(model, 0.002, {}, {'cam': 1.0})
    wd.step(WatchdogInput(now=1.0, q=q, joint_state_stamp=1.0, command=np.zeros(6),
                          solver_ok=True, solver_status='ok', input_stamps={},
                          input_timeouts={}, inputs_finite=True,
                          people={'cam': PersonSample('cam', np.array([1.0, 0.4, 0.6]), 1.0)},
                          person_sources=['cam'], joint_stamps=np.full(6, 1.0)))
    compiled = compile_skill(load_skill(ROOT / 'config' / 'cookbook' / 'carry_tray.yaml'))
    solver = SkillSolver(compiled)
    solver.solve(q, compiled.start_unknowns(), np.zeros(0), 0.5, 0.002, np.zeros(6))
    shapes = SkillShapes().shapes(compiled, solver.input_values())
    msg = MarkerBuilder(Port, 'base_link', 0.2).build(MarkerJob(wd.geometry(), None, None, 0),
                                                      shapes)
    save(marker_figure(marker_views(msg), 'test frame'), tmp_path / 'markers.png')
    (fig,) = saved
    problems = check_figure(fig, 'marker figure')
    assert not problems, '\n'.join(problems)
    labels = [h.get_label() for h in fig.axes[0].get_legend().legend_handles]
    assert 'monitored sphere (watchdog reduced)' in labels
    assert any(label.startswith('protective separation distance S_p') for label in labels)
    assert 'keep_in_box (box, point)' in labels and 'carry (line)' in labels
    # the plot rule "no colour twice in one panel" for the filled shapes too: each legend patch
    # (a state, the people, the S_p sphere, one constraint's geometry) has its own colour
    from matplotlib.colors import to_hex
    from matplotlib.patches import Patch
    fills = [to_hex(h.get_facecolor(), keep_alpha=False)
             for h in fig.axes[0].get_legend().legend_handles if isinstance(h, Patch)]
    assert len(fills) == len(set(fills)), labels
