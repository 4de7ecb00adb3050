"""`constraint-ctrl bench`: per-tick cost of the engine, measured against its raw bound.

All figures of one report come from one run on one machine: medians and percentiles of many
ticks, and ratios between figures measured side by side (the machine is shared and noisy, so
absolute numbers only mean something next to each other). Nothing here asserts a time.
"""
from __future__ import annotations

import gc
import json
import platform
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import quadprog

from ..skill.compile import CompiledSkill, compile_skill
from ..skill.loader import load_skill
from ..skill.schema import BehaviourSpec, ConstraintSpec, SkillSpec
from ..solve.qp import SkillSolver

CONFIG = Path(__file__).resolve().parents[2] / 'config'
EXAMPLE_SKILL = CONFIG / 'skills' / 'keep_tool_vertical.yaml'


@dataclass(frozen=True, slots=True)
class Stats:
    median_us: float
    p90_us: float
    p99_us: float
    max_us: float
    samples: int

    @classmethod
    def of(cls, ns: np.ndarray) -> Stats:
        us = ns / 1000.0
        return cls(float(np.median(us)), float(np.percentile(us, 90)),
                   float(np.percentile(us, 99)), float(us.max()), int(us.size))

    def as_dict(self) -> dict[str, float]:
        return {'median_us': round(self.median_us, 2), 'p90_us': round(self.p90_us, 2),
                'p99_us': round(self.p99_us, 2), 'max_us': round(self.max_us, 2),
                'samples': self.samples}


def _time_calls(fn: Callable[[], object], n: int) -> np.ndarray:
    out = np.empty(n, dtype=np.int64)
    clock = time.perf_counter_ns
    for i in range(n):
        start = clock()
        fn()
        out[i] = clock() - start
    return out


def _interleaved(fns: list[Callable[[], object]], n: int) -> list[np.ndarray]:
    """Time several calls alternately so slow phases of a noisy machine hit all of them."""
    out = [np.empty(n, dtype=np.int64) for _ in fns]
    clock = time.perf_counter_ns
    for i in range(n):
        for k, fn in enumerate(fns):
            start = clock()
            fn()
            out[k][i] = clock() - start
    return out


def bench_skill(skill: CompiledSkill, q: np.ndarray, ticks: int = 20000) -> dict[str, object]:
    """Engine tick (evaluate + assemble + solve) against the raw bound on identical matrices."""
    solver = SkillSolver(skill)
    s = skill.start_unknowns()
    solver.set_start(q, s)
    u = np.array([skill.spec.offline.inputs.get(name, 0.0) for name in skill.input_names])
    x = np.zeros(skill.n_x)
    dt = 0.002
    # settle into a typical operating point (a few hundred closed-loop ticks)
    for k in range(300):
        res = solver.solve(q, s, u, k * dt, dt, x)
        x = res.x
        q = q + dt * x[:skill.n_q]
        s = s + dt * x[skill.n_q:]
    t = 300 * dt

    def engine() -> object:
        return solver.solve(q, s, u, t, dt, x)

    engine()
    # the raw bound: the compiled CasADi call alone, then quadprog on the very same matrices
    G = solver.outputs['G'].copy(order='F')
    a = solver.outputs['a'].copy()
    C = solver.outputs['C'].copy(order='F')
    b = solver.outputs['b'].copy()
    meq = skill.layout.meq
    evaluate = solver._evaluate   # noqa: SLF001

    def raw_qp() -> object:
        return quadprog.solve_qp(G, a, C, b, meq)

    gc.disable()
    try:
        eng, ev, qp = _interleaved([engine, evaluate, raw_qp], ticks)
    finally:
        gc.enable()
    raw = ev + qp
    engine_stats = Stats.of(eng)
    raw_stats = Stats.of(raw)
    return {
        'skill': skill.spec.name,
        'joints': skill.n_q,
        'unknowns': skill.n_s,
        'rows': skill.n_rows,
        'qp_variables': skill.layout.n_z,
        'qp_constraints': skill.layout.n_con,
        'engine_tick': engine_stats.as_dict(),
        'raw_casadi_call': Stats.of(ev).as_dict(),
        'raw_quadprog': Stats.of(qp).as_dict(),
        'raw_bound': raw_stats.as_dict(),
        'ratio_median': round(engine_stats.median_us / raw_stats.median_us, 3),
        'ratio_p99': round(engine_stats.p99_us / raw_stats.p99_us, 3),
        'compile_ms': round(skill.compile_seconds * 1000.0, 1),
    }


def generated_chain_urdf(n_joints: int) -> str:
    """A serial chain of revolute joints with alternating axes (for the scaling table)."""
    axes = ['0 0 1', '0 1 0', '1 0 0']
    parts = ['<robot name="chain">', '<link name="link_0"/>']
    for i in range(1, n_joints + 1):
        parts.append(f'<link name="link_{i}"/>')
        parts.append(
            f'<joint name="joint_{i}" type="revolute"><parent link="link_{i - 1}"/>'
            f'<child link="link_{i}"/><origin xyz="0 0 {0.5 / n_joints:.6f}" rpy="0 0 0"/>'
            f'<axis xyz="{axes[i % 3]}"/><limit lower="-3" upper="3" velocity="2" effort="1"/>'
            '</joint>')
    parts.append('</robot>')
    return '\n'.join(parts)


def generated_skill(urdf_path: Path, n_joints: int, n_rows: int) -> SkillSpec:
    """n_rows soft scalar rows over points along the chain (positions and spacing)."""
    rng = np.random.default_rng(n_joints * 1000 + n_rows)
    constraints = []
    kinds = ['equal', 'at_most', 'at_least']
    for k in range(n_rows):
        link = 1 + int(rng.integers(n_joints // 2, n_joints))
        other = 1 + int(rng.integers(0, n_joints // 2))
        axis = k % 3
        kind = kinds[k % 3]
        value = f'position(link_{link})[{axis}] - 0.3 * position(link_{other})[{axis}]'
        bound = f'{0.05 * float(rng.standard_normal()):.4f}'
        fields: dict[str, object] = {'target': bound} if kind == 'equal' else \
            ({'upper': bound} if kind == 'at_most' else {'lower': bound})
        constraints.append(ConstraintSpec(name=f'row_{k}', function=value, kind=kind,
                                          behaviour=BehaviourSpec(order=1, gain=2.0),
                                          weight=float(1 + k % 5), **fields))
    return SkillSpec(name=f'chain_{n_joints}_{n_rows}', robot=urdf_path,
                     constraints=tuple(constraints))


def bench_scaling(workdir: Path, joints: tuple[int, ...] = (6, 12, 24, 48),
                  rows: tuple[int, ...] = (10, 50, 200), ticks: int = 2000
                  ) -> list[dict[str, object]]:
    table = []
    workdir.mkdir(parents=True, exist_ok=True)
    for n in joints:
        urdf = workdir / f'chain_{n}.urdf'
        urdf.write_text(generated_chain_urdf(n))
        for m in rows:
            skill = compile_skill(generated_skill(urdf, n, m))
            q = np.full(n, 0.3)
            result = bench_skill(skill, q, ticks=ticks)
            table.append({'joints': n, 'rows': m,
                          'median_us': result['engine_tick']['median_us'],  # type: ignore[index]
                          'p99_us': result['engine_tick']['p99_us'],  # type: ignore[index]
                          'ratio_median': result['ratio_median'],
                          'compile_ms': result['compile_ms']})
    return table


def bench_compile(skill_files: list[Path], repeats: int = 5) -> dict[str, float]:
    """Median load + compile time of each skill file, ms."""
    out = {}
    for path in skill_files:
        times = []
        for _ in range(repeats):
            start = time.perf_counter()
            spec = load_skill(path)
            compile_skill(spec)
            times.append(time.perf_counter() - start)
        out[path.name] = round(float(np.median(times)) * 1000.0, 1)
    return out


def run(json_path: Path | None, *, quick: bool = False, scaling: bool = True,
        extra: dict[str, Callable[[], dict[str, object]]] | None = None) -> dict[str, object]:
    """Run every benchmark section; write JSON if asked; return the report."""
    ticks = 3000 if quick else 20000
    spec = load_skill(EXAMPLE_SKILL)
    skill = compile_skill(spec)
    start = np.array([spec.offline.start.get(j, 0.0) for j in skill.joint_names])
    report: dict[str, object] = {
        'machine': {'python': platform.python_version(), 'processor': platform.machine(),
                    'note': 'one run; medians, percentiles and ratios of figures measured '
                            'side by side; shared 2-core machine'},
        'targets': {'engine_median_us': 100, 'engine_p99_us': 300, 'ratio_median': 1.5,
                    'scaling_48x200_median_us': 5000, 'compile_ms': 200},
        'example_tick': bench_skill(skill, start, ticks=ticks),
        'compile_ms': bench_compile(sorted((CONFIG / 'skills').glob('*.yaml')),
                                    repeats=2 if quick else 5),
    }
    if scaling:
        report['scaling'] = bench_scaling(Path(json_path).parent / 'bench_chains'
                                          if json_path else Path('out/bench_chains'),
                                          ticks=300 if quick else 2000)
    for name, fn in (extra or {}).items():
        report[name] = fn()
    if json_path is not None:
        Path(json_path).parent.mkdir(parents=True, exist_ok=True)
        Path(json_path).write_text(json.dumps(report, indent=2) + '\n')
    return report


__all__ = ['Stats', 'bench_compile', 'bench_scaling', 'bench_skill', 'generated_chain_urdf',
           'generated_skill', 'run']
