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
from dataclasses import dataclass, replace
from pathlib import Path
from collections.abc import Callable

import numpy as np
import quadprog

from ..skill.compile import CompiledSkill, compile_skill
from ..skill.loader import load_skill
from ..skill.schema import BehaviourSpec, ConstraintSpec, SkillSpec
from ..solve.qp import DAQP_EQUALITY, DAQP_INF, DAQP_PRIMAL_TOL, QP_SOLVERS, SkillSolver

CONFIG = Path(__file__).resolve().parents[2] / 'config'
EXAMPLE_SKILL = CONFIG / 'skills' / 'keep_tool_vertical.yaml'
#: Rows of the example skill that become its second priority level in the two-level example:
#: the wishes that may give way (tool heading, elbow height) below the path and the tool axis.
SECOND_LEVEL_ROWS = ('tool_heading', 'elbow_up')


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


def two_level_example(spec: SkillSpec) -> SkillSpec:
    """The example skill with SECOND_LEVEL_ROWS moved to priority 2."""
    constraints = tuple(replace(c, priority=2) if c.name in SECOND_LEVEL_ROWS else c
                        for c in spec.constraints)
    return replace(spec, name=spec.name + '_two_levels', constraints=constraints)


def _raw_qp(qp_solver: str, G: np.ndarray, a: np.ndarray, C: np.ndarray, b: np.ndarray,
            meq: int) -> Callable[[], object]:
    """The bare library call on fixed matrices (no wrapper of ours around it)."""
    if qp_solver == 'quadprog':
        return lambda: quadprog.solve_qp(G, a, C, b, meq)
    import daqp
    f = -a
    A = np.ascontiguousarray(C.T)
    upper = np.full(b.size, DAQP_INF)
    upper[:meq] = b[:meq]
    sense = np.zeros(b.size, dtype=np.intc)
    sense[:meq] = DAQP_EQUALITY
    return lambda: daqp.solve(G, f, A, upper, b, sense, primal_tol=DAQP_PRIMAL_TOL)


def bench_skill(skill: CompiledSkill, q: np.ndarray, ticks: int = 20000,
                qp_solver: str = 'quadprog') -> dict[str, object]:
    """Engine tick (evaluate + assemble + solve every level) against the raw bound.

    The raw bound is what the tick cannot avoid: every compiled call (the skill function, and the
    function of each lower level) and one bare QP call per level on identical matrices, timed
    interleaved with the engine.
    """
    solver = SkillSolver(skill, qp_solver=qp_solver)
    s = skill.start_unknowns()
    solver.set_start(q, s)
    u = np.array([skill.spec.offline.inputs.get(name, 0.0) for name in skill.input_names])
    x = np.zeros(skill.n_x)
    dt = 0.002
    # settle into a typical operating point (a few hundred closed-loop ticks)
    for k in range(300):
        res = solver.solve(q, s, u, k * dt, dt, x)
        x = res.x
        q = q + dt * x
        s = s + dt * x[skill.n_q:]
    t = 300 * dt

    def engine() -> object:
        return solver.solve(q, s, u, t, dt, x)

    last = solver.solve(q, s, u, t, dt, x)
    # the raw bound: the compiled calls alone, then the QP solver on the very same matrices
    out = solver.outputs
    qps = [_raw_qp(qp_solver, out['G'].copy(order='F'), out['a'].copy(),
                   out['C'].copy(order='F'), out['b'].copy(), skill.layout.meq)]
    levels = solver._levels   # noqa: SLF001
    for level in levels:
        lo = level.out
        qps.append(_raw_qp(qp_solver, lo['G'].copy(order='F'), lo['a'].copy(),
                           lo['C'].copy(order='F'), lo['b'].copy(), 0))
    evaluate = solver._evaluate   # noqa: SLF001
    level_calls = [level.evaluate for level in levels]

    def compiled_calls() -> None:
        evaluate()
        for call in level_calls:
            call()

    def qp_calls() -> None:
        for call in qps:
            call()

    gc.disable()
    try:
        eng, ev, qp = _interleaved([engine, compiled_calls, qp_calls], ticks)
    finally:
        gc.enable()
    raw = ev + qp
    engine_stats = Stats.of(eng)
    raw_stats = Stats.of(raw)
    return {
        'skill': skill.spec.name,
        'solver': qp_solver,
        'levels': len(skill.layout.levels),
        'levels_solved': last.levels_solved,
        'joints': skill.n_q,
        'unknowns': skill.n_s,
        'rows': skill.n_rows,
        'qp_variables': skill.layout.n_z,
        'qp_constraints': skill.layout.n_con,
        'engine_tick': engine_stats.as_dict(),
        'raw_casadi_call': Stats.of(ev).as_dict(),
        f'raw_{qp_solver}': Stats.of(qp).as_dict(),
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


def generated_skill(urdf_path: Path, n_joints: int, n_rows: int, levels: int = 1) -> SkillSpec:
    """n_rows soft scalar rows over points along the chain (positions and spacing).

    With ``levels`` > 1 the rows are dealt out over that many priority levels in turn (the same
    rows and bounds as the one-level skill, so the cells compare).
    """
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
                                          weight=float(1 + k % 5), priority=1 + k % levels,
                                          **fields))
    return SkillSpec(name=f'chain_{n_joints}_{n_rows}_{levels}', robot=urdf_path,
                     constraints=tuple(constraints))


def bench_scaling(workdir: Path, joints: tuple[int, ...] = (6, 12, 24, 48),
                  rows: tuple[int, ...] = (10, 50, 200), ticks: int = 2000,
                  levels: tuple[int, ...] = (1, 2),
                  solvers: tuple[str, ...] = QP_SOLVERS) -> list[dict[str, object]]:
    """Every joints x rows x levels cell, with each QP solver on the very same skill."""
    table = []
    workdir.mkdir(parents=True, exist_ok=True)
    for n in joints:
        urdf = workdir / f'chain_{n}.urdf'
        urdf.write_text(generated_chain_urdf(n))
        for m in rows:
            for n_levels in levels:
                skill = compile_skill(generated_skill(urdf, n, m, n_levels))
                for qp_solver in solvers:
                    result = bench_skill(skill, np.full(n, 0.3), ticks=ticks,
                                         qp_solver=qp_solver)
                    engine = result['engine_tick']
                    table.append({'joints': n, 'rows': m, 'levels': n_levels,
                                  'solver': qp_solver,
                                  'median_us': engine['median_us'],  # type: ignore[index]
                                  'p99_us': engine['p99_us'],  # type: ignore[index]
                                  'ratio_median': result['ratio_median'],
                                  'qp_variables': result['qp_variables'],
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
        extra: dict[str, Callable[[], dict[str, object]]] | None = None,
        qp_solver: str = 'quadprog', cells: tuple[tuple[int, int], ...] | None = None
        ) -> dict[str, object]:
    """Run every benchmark section; write JSON if asked; return the report.

    ``qp_solver`` is the solver of the example ticks; the scaling table always runs every solver.
    ``cells`` restricts the scaling table to these (joints, rows) pairs.
    """
    ticks = 3000 if quick else 20000
    spec = load_skill(EXAMPLE_SKILL)
    skill = compile_skill(spec)
    two_levels = compile_skill(two_level_example(spec))
    start = np.array([spec.offline.start.get(j, 0.0) for j in skill.joint_names])
    report: dict[str, object] = {
        'machine': {'python': platform.python_version(), 'processor': platform.machine(),
                    'note': 'one run; medians, percentiles and ratios of figures measured '
                            'side by side; shared 2-core machine'},
        'targets': {'engine_median_us': 100, 'engine_p99_us': 300, 'ratio_median': 1.5,
                    'scaling_48x200_median_us': 5000, 'compile_ms': 200},
        'example_tick': bench_skill(skill, start, ticks=ticks, qp_solver=qp_solver),
        'example_tick_levels': bench_skill(two_levels, start, ticks=ticks, qp_solver=qp_solver),
        'compile_ms': bench_compile(sorted((CONFIG / 'skills').glob('*.yaml')),
                                    repeats=2 if quick else 5),
    }
    if scaling:
        workdir = Path(json_path).parent / 'bench_chains' if json_path else Path('out/bench_chains')
        scaling_ticks = 300 if quick else 2000
        if cells is None:
            report['scaling'] = bench_scaling(workdir, ticks=scaling_ticks)
        else:
            report['scaling'] = [cell for n, m in cells
                                 for cell in bench_scaling(workdir, (n,), (m,), scaling_ticks)]
    for name, fn in (extra or {}).items():
        report[name] = fn()
    if json_path is not None:
        Path(json_path).parent.mkdir(parents=True, exist_ok=True)
        Path(json_path).write_text(json.dumps(report, indent=2) + '\n')
    return report


__all__ = ['Stats', 'bench_compile', 'bench_scaling', 'bench_skill', 'generated_chain_urdf',
           'generated_skill', 'run', 'two_level_example']
