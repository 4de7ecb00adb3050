"""PNG plots of a simulation trace (matplotlib, no display needed)."""
from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    from ..skill.compile import CompiledSkill
    from .simulate import Trace


def _figure(rows: int = 1):
    import matplotlib
    matplotlib.use('Agg')
    import matplotlib.pyplot as plt
    fig, axes = plt.subplots(rows, 1, figsize=(10, 3.2 * rows), sharex=True, squeeze=False)
    return plt, fig, axes[:, 0]


def _per_constraint(skill: CompiledSkill, values: np.ndarray) -> dict[str, np.ndarray]:
    """Largest absolute value over each constraint's rows, per tick."""
    out = {}
    for con in skill.spec.constraints:
        idx = [i for i, r in enumerate(skill.rows) if r.constraint == con.name]
        out[con.name] = np.abs(values[:, idx]).max(axis=1)
    return out


def plot_simulation(skill: CompiledSkill, trace: Trace, out_dir: Path) -> list[Path]:
    written = []
    t = trace.time
    plt, fig, (ax,) = _figure()
    for name, series in _per_constraint(skill, trace.error).items():
        ax.semilogy(t, np.maximum(series, 1e-12), label=name)
    ax.set_ylabel('|error| (units of the task)')
    ax.set_xlabel('time (s)')
    ax.set_title(f'{skill.spec.name}: constraint errors (largest row of each constraint)')
    ax.grid(True, which='both', alpha=0.3)
    ax.legend(fontsize=8, ncol=2)
    written.append(_save(plt, fig, out_dir / 'errors.png'))

    plt, fig, (ax,) = _figure()
    for name, series in _per_constraint(skill, trace.slack).items():
        ax.plot(t, series, label=name)
    ax.set_ylabel('|slack| (rate units of the task)')
    ax.set_xlabel('time (s)')
    ax.set_title(f'{skill.spec.name}: slacks (how far each row is from its asked rate)')
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=8, ncol=2)
    written.append(_save(plt, fig, out_dir / 'slacks.png'))

    rows = 2 if skill.n_s else 1
    plt, fig, axes = _figure(rows)
    for j, name in enumerate(skill.joint_names):
        axes[0].plot(t, trace.joint_velocity[:, j], label=name)
    axes[0].set_ylabel('joint velocity (rad/s)')
    axes[0].set_title(f'{skill.spec.name}: published velocities (after the watchdog)')
    axes[0].grid(True, alpha=0.3)
    axes[0].legend(fontsize=8, ncol=3)
    if skill.n_s:
        for j, name in enumerate(skill.unknown_names):
            axes[1].plot(t, trace.unknown_velocity[:, j], label=name)
        axes[1].set_ylabel('unknown velocity')
        axes[1].grid(True, alpha=0.3)
        axes[1].legend(fontsize=8)
    axes[-1].set_xlabel('time (s)')
    written.append(_save(plt, fig, out_dir / 'joint_velocities.png'))
    return written


def _save(plt, fig, path: Path) -> Path:
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path


__all__ = ['plot_simulation']
