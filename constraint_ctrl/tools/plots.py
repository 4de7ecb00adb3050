"""PNG plots of the offline tools and the demo (matplotlib, no display needed).

Rules every plot here follows, so a person can read it without asking (checked mechanically in
test/unit/test_plot_rules.py):
- every axis has a label with its unit in parentheses (a categorical axis names its levels);
- within one panel no two lines share colour and line style (``styles``: ten colours, then the
  same colours dashed, dotted, ...);
- on a log scale, values at or below the floor are not drawn (``above_floor``), never drawn as
  if they were the floor; the panel says so;
- a state (the watchdog's) gets its own small panel with named levels (``state_panel``);
- step names are placed so that they never overlap (``label_steps``: staggered rows).

Figures are built with matplotlib's object interface (no pyplot state), so they can be made in
tests and inspected before they are written.
"""
from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any
from collections.abc import Iterable, Sequence

import numpy as np

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

    from ..skill.compile import CompiledSkill
    from .replay import RecordedRows, ReplayTrace
    from .simulate import Trace

#: Colours of matplotlib's default cycle ('tab10'), in order.
COLOURS = ('tab:blue', 'tab:orange', 'tab:green', 'tab:red', 'tab:purple', 'tab:brown',
           'tab:pink', 'tab:gray', 'tab:olive', 'tab:cyan')
LINE_STYLES = ('-', '--', ':', '-.')
#: Marker shapes for series drawn as dots, one per round of the ten colours.
MARKERS = ('o', 's', '^', 'D')
#: Smallest value drawn on a log axis of errors and slacks; smaller ones (0 included) are left out.
LOG_FLOOR = 1e-9
#: Watchdog states from least to most restrictive (safety/states.py), bottom to top of the panel.
WATCHDOG_LEVELS = ('normal', 'reduced', 'stopping', 'stopped')
DPI = 90
#: Free space kept on each side of a step label (pixels at DPI), so neighbours never touch.
LABEL_GAP = 8.0


def styles(n: int) -> list[dict[str, str]]:
    """n distinct (colour, line style) pairs: all colours solid, then dashed, and so on."""
    out = []
    for i in range(n):
        out.append({'color': COLOURS[i % len(COLOURS)],
                    'linestyle': LINE_STYLES[(i // len(COLOURS)) % len(LINE_STYLES)]})
    return out


def marker_styles(n: int) -> list[dict[str, str]]:
    """n distinct (colour, marker) pairs for series drawn as dots without lines."""
    return [{'color': COLOURS[i % len(COLOURS)],
             'marker': MARKERS[(i // len(COLOURS)) % len(MARKERS)]} for i in range(n)]


def above_floor(values: np.ndarray, floor: float = LOG_FLOOR) -> np.ndarray:
    """|values| with everything at or below ``floor`` (and non-finite values) as NaN: not drawn."""
    out = np.abs(np.asarray(values, dtype=float))
    out[~(out > floor)] = np.nan
    return out


def figure(rows: int = 1, *, height: float = 3.2, width: float = 11.0,
           ratios: Sequence[float] | None = None, sharex: bool = True) -> tuple[Figure, list[Axes]]:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    fig = Figure(figsize=(width, height * rows if ratios is None else height),
                 layout='constrained')
    FigureCanvasAgg(fig)      # a renderer for measuring text (label_steps) and for savefig
    axes = fig.subplots(rows, 1, sharex=sharex, squeeze=False,
                        gridspec_kw={'height_ratios': list(ratios)} if ratios else None)
    return fig, list(axes[:, 0])


def save(fig: Figure, path: Path) -> Path:
    fig.savefig(path, dpi=DPI)
    return path


def legend_outside(ax: Axes, **kwargs: Any) -> None:
    """Legend to the right of the panel, so it never hides data."""
    ax.legend(loc='upper left', bbox_to_anchor=(1.005, 1.0), borderaxespad=0.0,
              fontsize=kwargs.pop('fontsize', 8), **kwargs)


def state_panel(ax: Axes, time: np.ndarray, states: Sequence[str], *,
                levels: Sequence[str] = WATCHDOG_LEVELS, label: str = 'watchdog state',
                **style: Any) -> None:
    """A state over time as a step line on named levels (its own small panel)."""
    code = {name: i for i, name in enumerate(levels)}
    y = np.array([code.get(s, np.nan) for s in states], dtype=float)
    style.setdefault('color', 'black')
    ax.plot(time, y, drawstyle='steps-post', lw=1.4, label=label.replace('\n', ' '), **style)
    ax.set_yticks(range(len(levels)), list(levels))
    ax.set_ylim(-0.5, len(levels) - 0.5)
    ax.set_ylabel(label)
    ax.grid(alpha=0.3, axis='y')


def shade_steps(ax: Axes, steps: Sequence[tuple[str, float, float]]) -> None:
    """Alternate grey bands behind the data, one per step."""
    for i, (_, a, b) in enumerate(steps):
        ax.axvspan(a, b, color='0.90' if i % 2 else '0.96', zorder=0, lw=0)


def label_steps(ax: Axes, steps: Sequence[tuple[str, float, float]], *,
                fontsize: float = 7.5) -> int:
    """Step names above the panel, each centred on its step, staggered into rows so that no
    two overlap (measured with the renderer); returns the number of rows used.

    Call after the x limits are final. Names of steps outside the x range are left out.
    """
    from matplotlib.transforms import Bbox
    renderer = ax.figure.canvas.get_renderer()
    lo, hi = ax.get_xlim()
    rows: list[list[Any]] = []
    for name, a, b in steps:
        centre = 0.5 * (max(a, lo) + min(b, hi))
        if b < lo or a > hi:
            continue
        level = 0
        while True:
            text = ax.annotate(name.replace('_', ' '), xy=(centre, 1.0),
                               xycoords=('data', 'axes fraction'),
                               xytext=(0, 3 + 11 * level), textcoords='offset points',
                               ha='center', va='bottom', fontsize=fontsize, annotation_clip=False)
            box = text.get_window_extent(renderer)
            box = Bbox.from_extents(box.x0 - LABEL_GAP, box.y0, box.x1 + LABEL_GAP, box.y1)
            if level == len(rows):
                rows.append([])
            if not any(box.overlaps(other) for other in rows[level]):
                rows[level].append(box)
                break
            text.remove()
            level += 1
    return len(rows)


def title_above_steps(ax: Axes, title: str, rows: int) -> None:
    ax.set_title(title, pad=6 + 11 * rows)


# ----------------------------------------------------------------------------- simulate

def _per_constraint(skill: CompiledSkill, values: np.ndarray) -> dict[str, np.ndarray]:
    """Largest absolute value over each constraint's rows, per tick."""
    out = {}
    for con in skill.spec.constraints:
        idx = [i for i, r in enumerate(skill.rows) if r.constraint == con.name]
        out[con.name] = np.abs(values[:, idx]).max(axis=1) if idx else np.zeros(len(values))
    return out


def simulation_figures(skill: CompiledSkill, trace: Trace) -> dict[str, Figure]:
    t = trace.time
    name = skill.spec.name
    figures = {}
    xlabel = 'time since the skill started (s)'

    fig, (ax,) = figure()
    per = _per_constraint(skill, trace.error)
    for (con, series), style in zip(per.items(), styles(len(per))):
        ax.semilogy(t, above_floor(series), label=con, **style)
    ax.set_ylabel('|error| (unit of its function)')
    ax.set_xlabel(xlabel)
    ax.set_title(f'{name}: constraint errors, largest row of each constraint '
                 f'(values <= {LOG_FLOOR:g} not drawn)')
    ax.grid(True, which='both', alpha=0.3)
    legend_outside(ax)
    figures['errors.png'] = fig

    fig, (ax,) = figure()
    per = _per_constraint(skill, trace.slack)
    for (con, series), style in zip(per.items(), styles(len(per))):
        ax.plot(t, series, label=con, **style)
    ax.set_ylabel('|slack| (unit of its function / s)')
    ax.set_xlabel(xlabel)
    ax.set_title(f'{name}: slacks (how far each row is from the rate it asked for)')
    ax.grid(True, alpha=0.3)
    legend_outside(ax)
    figures['slacks.png'] = fig

    states = list(getattr(trace, 'state', []) or [])   # the watchdog's, when simulate ran it
    heights = [3.0] + ([3.0] if skill.n_s else []) + ([1.3] if states else [])
    fig, axes = figure(len(heights), height=sum(heights), ratios=heights)
    prismatic = skill.model.is_prismatic
    unit = 'rad/s' if not prismatic.any() else ('m/s' if prismatic.all() else 'rad/s or m/s')
    for (j, joint), style in zip(enumerate(skill.joint_names), styles(skill.n_q)):
        axes[0].plot(t, trace.joint_velocity[:, j], label=joint, **style)
    axes[0].set_ylabel(f'joint velocity ({unit})')
    axes[0].set_title(f'{name}: published velocities (after the watchdog)')
    axes[0].grid(True, alpha=0.3)
    legend_outside(axes[0])
    if skill.n_s:
        units = sorted({f.unit or '1' for f in skill.spec.unknowns})
        for (j, unknown), style in zip(enumerate(skill.unknown_names), styles(skill.n_s)):
            axes[1].plot(t, trace.unknown_velocity[:, j], label=unknown, **style)
        axes[1].set_ylabel('unknown velocity (' + ' or '.join(f'{u}/s' for u in units) + ')')
        axes[1].grid(True, alpha=0.3)
        legend_outside(axes[1])
    if states:
        state_panel(axes[-1], t[:len(states)], states)
    axes[-1].set_xlabel(xlabel)
    figures['joint_velocities.png'] = fig
    return figures


def plot_simulation(skill: CompiledSkill, trace: Trace, out_dir: Path) -> list[Path]:
    return [save(fig, out_dir / name) for name, fig in simulation_figures(skill, trace).items()]


# ------------------------------------------------------------------------------- replay

def replay_figures(trace: ReplayTrace, rows: RecordedRows, joint_names: Sequence[str],
                   skill: str) -> dict[str, Figure]:
    t = trace.time
    xlabel = 'time since the bag began (s)'
    figures = {}

    n = len(joint_names)
    fig, axes = figure(n + 2, height=13.0, ratios=[2] * n + [2, 1])
    for j, name in enumerate(joint_names):
        ax = axes[j]
        ax.plot(t, trace.recorded[:, j], color='tab:blue', lw=1.6, label='recorded')
        ax.plot(t, trace.command[:, j], color='tab:orange', lw=1.0, linestyle='--',
                label='replayed')
        ax.set_ylabel(f'{name} (rad/s)', fontsize=8)
        ax.grid(alpha=0.3)
    legend_outside(axes[0])
    diff = np.abs(trace.command - trace.recorded).max(axis=1)
    axes[n].semilogy(t, above_floor(diff), color='tab:red', lw=1,
                     label='largest over joints')
    axes[n].set_ylabel('|replayed - recorded| (rad/s)', fontsize=8)
    axes[n].set_title(f'difference (ticks that agree to {LOG_FLOOR:g} or better are not drawn)',
                      fontsize=8)
    axes[n].grid(alpha=0.3, which='both')
    legend_outside(axes[n])
    if len(rows.time) and any(rows.watchdog_state):
        state_panel(axes[n + 1], rows.time, rows.watchdog_state, label='watchdog state',
                    color='tab:blue', alpha=0.5)
        axes[n + 1].lines[-1].set(linewidth=3.0, label='recorded (~/status)')
    state_panel(axes[n + 1], t, trace.state, label='watchdog state', color='tab:orange',
                linestyle='--')
    axes[n + 1].lines[-1].set_label('replayed')
    legend_outside(axes[n + 1])
    axes[-1].set_xlabel(xlabel)
    axes[0].set_title(f'{skill}: joint velocity commands, recorded and replayed')
    figures['commands.png'] = fig

    constraints = list(trace.constraints)
    fig, axes = figure(2, height=3.6)
    palette = styles(len(constraints))
    dots = marker_styles(len(constraints))
    for what, ax, values in (('error', axes[0], trace.error), ('slack', axes[1], trace.slack)):
        for con, style, dot in zip(constraints, palette, dots):
            idx = trace.constraints[con]
            if not idx:
                continue
            ours = above_floor(np.nanmax(np.abs(values[:, idx]), axis=1))
            note = '' if np.isfinite(ours).any() else f', always <= {LOG_FLOOR:g}'
            ax.semilogy(t, ours, lw=1.0, label=f'{con} (replayed{note})', **style)
            recorded = [rows.values.get(trace.row_names[i], {}).get(what) for i in idx]
            recorded = [r for r in recorded if r is not None]
            if recorded and len(rows.time):
                theirs = above_floor(np.nanmax(np.abs(np.vstack(recorded)), axis=0))
                note = '' if np.isfinite(theirs).any() else f', always <= {LOG_FLOOR:g}'
                ax.semilogy(rows.time, theirs, linestyle='none', ms=3,
                            label=f'{con} (recorded{note})', **dot)
        ax.grid(alpha=0.3, which='both')
        legend_outside(ax, fontsize=7)
    axes[0].set_ylabel('|error| (unit of its function)')
    axes[1].set_ylabel('|slack| (unit of its function / s)')
    axes[1].set_xlabel(xlabel)
    axes[0].set_title(f'{skill}: largest row of each constraint; lines: replayed, every tick; '
                      'dots: recorded on ~/status\n'
                      f'(values <= {LOG_FLOOR:g}, e.g. a bound not reached, are not drawn)')
    figures['rows.png'] = fig
    return figures


def plot_replay(trace: ReplayTrace, rows: RecordedRows, joint_names: Sequence[str], skill: str,
                out_dir: Path) -> list[Path]:
    return [save(fig, out_dir / name)
            for name, fig in replay_figures(trace, rows, joint_names, skill).items()]


def _quaternion_matrix(x: float, y: float, z: float, w: float) -> np.ndarray:
    """Rotation matrix of a unit quaternion (x, y, z, w), as geometry_msgs orders it."""
    return np.array([
        [1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)],
        [2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)],
        [2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)]])


def _sphere(ax: Axes, centre: np.ndarray, radius: float, colour: Sequence[float], *,
            wire: bool) -> None:
    u, v = np.meshgrid(np.linspace(0, 2 * np.pi, 25), np.linspace(0, np.pi, 13))
    x = centre[0] + radius * np.cos(u) * np.sin(v)
    y = centre[1] + radius * np.sin(u) * np.sin(v)
    z = centre[2] + radius * np.cos(v)
    if wire:
        ax.plot_wireframe(x, y, z, color=colour[:3], alpha=0.35, linewidth=0.5)
    else:
        ax.plot_surface(x, y, z, color=colour[:3], alpha=max(0.3, colour[3]), linewidth=0)


def _cube(ax: Axes, centre: np.ndarray, rotation: np.ndarray, size: np.ndarray,
          colour: Sequence[float]) -> np.ndarray:
    from mpl_toolkits.mplot3d.art3d import Poly3DCollection
    signs = np.array([[sx, sy, sz] for sx in (-1, 1) for sy in (-1, 1) for sz in (-1, 1)])
    corners = centre + (signs * size / 2.0) @ rotation.T
    faces = [[0, 1, 3, 2], [4, 5, 7, 6], [0, 1, 5, 4], [2, 3, 7, 6], [0, 2, 6, 4], [1, 3, 7, 5]]
    ax.add_collection3d(Poly3DCollection([corners[f] for f in faces], alpha=0.25,
                                         facecolor=colour[:3], edgecolor=colour[:3]))
    return corners


def marker_figure(markers: Sequence[dict[str, Any]], title: str) -> Figure:
    """One frame of ~/markers in 3D (what RViz would show, without RViz).

    ``markers``: plain values per marker ('ns', 'type' as visualization_msgs numbers, 'text',
    'position' (3,), 'orientation' (x, y, z, w), 'scale' (3,), 'colour' (r, g, b, a), 'points'
    [(3,)]); DELETEALL entries are skipped. Spheres of the monitored points are drawn solid in
    their state colour, each person's protective distance as a wire sphere, constraint lines and
    segments as lines (one style each, named in the legend), planes and boxes as faces.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch
    from matplotlib.colors import to_rgb
    sphere_t, cube_t, line_list_t = 2, 1, 5
    fig = Figure(figsize=(10.0, 8.0), layout='constrained')
    FigureCanvasAgg(fig)
    ax = fig.add_subplot(projection='3d')
    extent: list[np.ndarray] = []
    handles: list[Any] = []
    named: set[str] = set()
    lines = [m for m in markers if m['type'] == line_list_t]
    line_styles = iter(styles(len(lines)))
    # a constraint's points, planes and boxes share one colour of their own (one legend entry
    # per constraint, naming its shapes): no colour twice in the panel; the watchdog's spheres
    # and the people keep the colours ~/markers gives them (red/orange/yellow/green, blue)
    own = ('tab:purple', 'tab:brown', 'tab:pink', 'tab:olive', 'tab:cyan', 'tab:gray',
           'black', 'gold', 'teal', 'navy')
    constraint_colour: dict[str, tuple[float, ...]] = {}
    constraint_kinds: dict[str, list[str]] = {}
    fixed = ('monitored_spheres', 'people', 'protective_distance')
    for m in markers:
        if m.get('action', 0) == 3:
            continue
        centre = np.asarray(m['position'], dtype=float)
        colour = tuple(m['colour'])
        if m['ns'] == 'protective_distance':   # the person is blue too: a lighter blue
            colour = (*to_rgb('lightskyblue'), colour[3] if len(colour) > 3 else 1.0)
        if m['type'] in (sphere_t, cube_t) and m['ns'] not in fixed:
            name = m['text']
            if name not in constraint_colour:
                rgb = to_rgb(own[len(constraint_colour) % len(own)])
                constraint_colour[name] = (*rgb, colour[3] if len(colour) > 3 else 1.0)
                constraint_kinds[name] = []
            colour = constraint_colour[name]
            kind = ('point' if m['type'] == sphere_t
                    else 'plane' if min(m['scale']) < 0.01 else 'box')
            if kind not in constraint_kinds[name]:
                constraint_kinds[name].append(kind)
        if m['type'] == sphere_t:
            radius = float(m['scale'][0]) / 2.0
            wire = m['ns'] == 'protective_distance'
            _sphere(ax, centre, radius, colour, wire=wire)
            extent += [centre - radius, centre + radius]
            label = {'monitored_spheres': f'monitored sphere (watchdog {m["text"]})',
                     'people': 'person',
                     'protective_distance': f'protective separation distance S_p '
                                            f'(radius {radius:.3f} m)'}.get(m['ns'], '')
            if label and label not in named:
                named.add(label)
                handles.append(Patch(facecolor=colour[:3], alpha=0.6 if not wire else 0.3,
                                     label=label))
        elif m['type'] == cube_t:
            rotation = _quaternion_matrix(*m['orientation'])
            corners = _cube(ax, centre, rotation, np.asarray(m['scale'], dtype=float), colour)
            extent += [corners.min(axis=0), corners.max(axis=0)]
        elif m['type'] == line_list_t:
            pts = np.asarray(m['points'], dtype=float).reshape(-1, 3)
            style = next(line_styles)
            (line,) = ax.plot(pts[:, 0], pts[:, 1], pts[:, 2], lw=1.6,
                              label=f'{m["text"]} (line)', **style)
            handles.append(line)
            extent += [pts.min(axis=0), pts.max(axis=0)]
    for name, rgba in constraint_colour.items():
        handles.append(Patch(facecolor=rgba[:3], alpha=0.5,
                             label=f'{name} ({", ".join(constraint_kinds[name])})'))
    if extent:
        lo, hi = np.min(extent, axis=0), np.max(extent, axis=0)
        middle, half = (lo + hi) / 2.0, max(float((hi - lo).max()) / 2.0, 0.1)
        ax.set_xlim(middle[0] - half, middle[0] + half)
        ax.set_ylim(middle[1] - half, middle[1] + half)
        ax.set_zlim(middle[2] - half, middle[2] + half)
    ax.set_box_aspect((1.0, 1.0, 1.0))
    ax.set_xlabel('x (m)')
    ax.set_ylabel('y (m)')
    ax.set_zlabel('z (m)')
    ax.set_title(title, fontsize=9)
    if handles:
        ax.legend(handles=handles, loc='upper left', bbox_to_anchor=(1.02, 1.0), fontsize=7)
    return fig


def lines_of(ax: Axes) -> Iterable[Any]:
    """The data lines of a panel (for the rule checks)."""
    return [line for line in ax.get_lines() if not line.get_label().startswith('_')]


__all__ = ['COLOURS', 'LOG_FLOOR', 'WATCHDOG_LEVELS', 'above_floor', 'figure', 'label_steps',
           'legend_outside', 'marker_figure', 'marker_styles', 'plot_replay', 'plot_simulation',
           'replay_figures', 'save',
           'shade_steps', 'simulation_figures', 'state_panel', 'styles', 'title_above_steps']
