"""`constraint-ctrl`: one command line for the offline tools and the nodes.

Subcommands import what they need lazily, so `check` never loads a middleware and a missing
optional dependency only affects the subcommand that needs it. Errors of this package are
printed as one line (file:line: field: message) with exit code 2, never as a traceback.
"""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from .errors import ConstraintCtrlError

#: solve/qp.py: QP_SOLVERS (spelled out so the command line does not import the solver early)
QP_SOLVER_CHOICES = ('quadprog', 'daqp')


def _check(args: argparse.Namespace) -> int:
    from .tools.check import check_file
    status = 0
    for path in args.skills:
        report = check_file(Path(path))
        print('\n'.join(report.lines()))
        if not report.clean:
            status = 1
    return status


def _simulate(args: argparse.Namespace) -> int:
    from .tools.simulate import simulate_file
    summary, written = simulate_file(Path(args.skill), args.duration, Path(args.out),
                                     dt=args.tick, progress=not args.quiet,
                                     qp_solver=args.qp_solver)
    cons = summary['constraints']
    assert isinstance(cons, dict)
    print(f"simulated {summary['skill']} for {args.duration} s "
          f"({summary['ticks']} ticks of {args.tick} s)")
    for name, row in cons.items():
        print(f"  {name:24s} final error {row['final_error']:.3g}  max slack "
              f"{row['max_slack']:.3g}")
    for ev in summary['events']:  # type: ignore[union-attr]
        print(f"  event {ev['event']} at {ev['time_s']:.3f} s")
    print('outputs: ' + ', '.join(str(p) for p in written))
    statuses = summary['solve_status_counts']
    assert isinstance(statuses, dict)
    return 0 if set(statuses) <= {'ok'} else 1


def _bench(args: argparse.Namespace) -> int:
    from .tools.bench import run
    extra = {}
    if not args.core_only:
        extra = _bench_sections(args)
    cells = tuple(args.cells) if args.cells else None
    report = run(Path(args.json) if args.json else None, quick=args.quick,
                 scaling=not args.no_scaling, extra=extra, qp_solver=args.qp_solver,
                 cells=cells)
    print(json.dumps(report, indent=2))
    return 0


def _cell(text: str) -> tuple[int, int]:
    """'48x200' -> (48, 200): one cell of the scaling table."""
    try:
        joints, rows = (int(part) for part in text.lower().split('x'))
    except ValueError:
        raise argparse.ArgumentTypeError(f'expected JOINTSxROWS such as 48x200, got {text!r}') \
            from None
    if joints < 2 or rows < 1:
        raise argparse.ArgumentTypeError(f'a cell needs >= 2 joints and >= 1 row, got {text!r}')
    return joints, rows


def _bench_sections(args: argparse.Namespace) -> dict:
    sections = {}
    try:
        from .safety.bench import bench_watchdog
        sections['watchdog'] = lambda: bench_watchdog(ticks=3000 if args.quick else 20000)
    except ImportError:  # pragma: no cover - during development only
        pass
    try:
        from .tools.bench_node import bench_end_to_end
        sections['end_to_end'] = lambda: bench_end_to_end(
            duration=args.e2e_seconds, rate_hz=args.e2e_rate)
    except ImportError:  # pragma: no cover
        pass
    return sections


def _functions(_args: argparse.Namespace) -> int:
    from .skill.formula import FUNCTIONS
    for name in sorted(FUNCTIONS):
        print(FUNCTIONS[name])
    return 0


#: Subcommands that start a process with its own options and ROS arguments (passed raw).
NODE_COMMANDS = {
    'run': ('.nodes.controller_node', 'start the controller node'),
    'sim': ('.nodes.sim_node', 'start the simulated work cell node'),
    'sequence': ('.nodes.sequencer_node', 'run a task plan against the controller'),
    'demo': ('.tools.demo', 'run the whole work-cell demo (sim, controller, sequencer)'),
}


def _run_node(command: str, argv: list[str]) -> int:
    import importlib
    module = importlib.import_module(NODE_COMMANDS[command][0], __package__)
    return int(module.run(argv) or 0)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog='constraint-ctrl', description=__doc__.splitlines()[0])
    sub = parser.add_subparsers(dest='command', required=True)

    p = sub.add_parser('check', help='validate skill files and inspect them at their start pose')
    p.add_argument('skills', nargs='+', help='skill YAML files')
    p.set_defaults(func=_check)

    p = sub.add_parser('simulate', help='lockstep kinematic simulation of one skill')
    p.add_argument('skill')
    p.add_argument('--duration', type=float, default=5.0, help='simulated seconds')
    p.add_argument('--out', default='out/simulate', help='output folder')
    p.add_argument('--tick', type=float, default=0.002, help='control period, s')
    p.add_argument('--quiet', action='store_true', help='no progress bar')
    p.add_argument('--qp-solver', choices=QP_SOLVER_CHOICES, default='quadprog',
                   help='QP solver of every level (same matrices, same answers)')
    p.set_defaults(func=_simulate)

    p = sub.add_parser('bench', help='measure tick cost, scaling, watchdog and end-to-end latency')
    p.add_argument('--json', help='write the report to this file')
    p.add_argument('--quick', action='store_true', help='fewer samples (for a smoke run)')
    p.add_argument('--no-scaling', action='store_true', help='skip the scaling table')
    p.add_argument('--core-only', action='store_true', help='engine sections only')
    p.add_argument('--e2e-seconds', type=float, default=60.0)
    p.add_argument('--e2e-rate', type=float, default=1000.0)
    p.add_argument('--qp-solver', choices=QP_SOLVER_CHOICES, default='quadprog',
                   help='QP solver of the example ticks (the scaling table runs both)')
    p.add_argument('--cells', nargs='+', metavar='JxR', type=_cell,
                   help='only these cells of the scaling table, e.g. 6x200 48x200')
    p.set_defaults(func=_bench)

    p = sub.add_parser('functions', help='list the functions of the formula language')
    p.set_defaults(func=_functions)

    _add_bag_and_pose_commands(sub)

    for name, (_, text) in NODE_COMMANDS.items():
        p = sub.add_parser(name, help=text + ' (see: constraint-ctrl ' + name + ' --help)',
                           add_help=False)
        p.add_argument('rest', nargs=argparse.REMAINDER)
    return parser


# --- pose and replay (issue 10 items 3 and 4): one block, registered by build_parser ---------

def _pose(args: argparse.Namespace) -> int:
    from .tools.pose import run_pose
    code, lines, message = run_pose(Path(args.urdf), args.tool, args.at,
                                    tool_down=args.tool_down, rpy=args.rpy, near=args.near,
                                    base_link=args.base, tolerance=args.tolerance)
    print('\n'.join(lines))
    if message:
        print(f'error: {message}', file=sys.stderr)
    return code


def _replay(args: argparse.Namespace) -> int:
    from .tools.replay import run_replay
    return run_replay(args)


def _add_bag_and_pose_commands(sub) -> None:  # noqa: ANN001 - argparse's private type
    p = sub.add_parser('pose', help='joint positions that put a tool at a pose, or the tool '
                       'pose for given joints (output pastes into offline.start)')
    p.add_argument('urdf', help='robot URDF file')
    p.add_argument('--tool', required=True, help='link whose pose is asked for')
    p.add_argument('--at', nargs=3, type=float, metavar=('X', 'Y', 'Z'),
                   help='target position of the tool in the base frame (m); without it the '
                   "tool's pose for --near (or the zero/mid pose) is printed")
    way = p.add_mutually_exclusive_group()
    way.add_argument('--tool-down', action='store_true',
                     help='tool z axis along -z of the base (heading free)')
    way.add_argument('--rpy', nargs=3, type=float, metavar=('R', 'P', 'Y'),
                     help='target orientation, URDF roll-pitch-yaw about fixed base axes (rad)')
    p.add_argument('--near', metavar='JOINTS',
                   help="start guess (or the joints to evaluate without --at) as a YAML mapping, "
                   "e.g. '{joint_2: 0.8, joint_3: 0.3}'; joints left out are 0 (or mid-range)")
    p.add_argument('--base', help='base frame (default: the URDF root link)')
    p.add_argument('--tolerance', type=float, default=1e-5,
                   help='accepted position (m) and orientation (rad) error; default 1e-5')
    p.set_defaults(func=_pose)

    from .tools.replay import add_arguments
    p = sub.add_parser('replay', help='re-run a skill open-loop over a recorded bag and '
                       'compare its commands with the recorded ones')
    add_arguments(p)
    p.set_defaults(func=_replay)


def report_errors(func, *args) -> int:  # noqa: ANN001 - any entry point
    """Run an entry point; our own errors become one line on stderr and exit code 2."""
    try:
        return int(func(*args) or 0)
    except ConstraintCtrlError as err:
        print(f'error: {err}', file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    if argv and argv[0] in NODE_COMMANDS:
        return report_errors(_run_node, argv[0], argv[1:])
    args = build_parser().parse_args(argv)
    return report_errors(args.func, args)


if __name__ == '__main__':
    sys.exit(main())
