"""`constraint-ctrl`: one command line for the offline tools and the nodes.

Subcommands import what they need lazily, so `check` never loads a middleware and a missing
optional dependency only affects the subcommand that needs it. Errors of this package are
printed as one line (file:line: field: message) with exit code 2, never as a traceback; any
other exception that escapes a command (a bug) is one line with exit code 1, and its full
traceback is printed too with the global option ``--debug`` (or the environment variable
CONSTRAINT_CTRL_DEBUG=1, for entry points started by ros2 run or launch).
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import traceback
from pathlib import Path

from .errors import ConstraintCtrlError

#: solve/qp.py: QP_SOLVERS (spelled out so the command line does not import the solver early)
QP_SOLVER_CHOICES = ('quadprog', 'daqp')


def _check(args: argparse.Namespace) -> int:
    """Check every file named; one that cannot be loaded is reported and the others still run.

    Exit code: 0 all clean, 1 warnings or errors found, 2 a file could not be loaded.
    """
    from .model.kinematics import RobotModel
    from .tools.check import check_file
    robot = RobotModel.from_urdf(args.robot) if args.robot else None
    status = 0
    for path in args.skills:
        try:
            report = check_file(Path(path), rate_hz=args.rate, robot=robot)
        except ConstraintCtrlError as err:
            print(f'error: {err}', file=sys.stderr)
            status = 2
            continue
        print('\n'.join(report.lines()))
        if not report.clean:
            status = max(status, 1)
    return status


def _simulate(args: argparse.Namespace) -> int:
    from .tools.simulate import simulate_file
    summary, written = simulate_file(Path(args.skill), args.duration, Path(args.out),
                                     dt=args.tick, progress=not args.quiet,
                                     params_file=Path(args.params_file) if args.params_file
                                     else None, qp_solver=args.qp_solver,
                                     robot=Path(args.robot) if args.robot else None)
    cons = summary['constraints']
    assert isinstance(cons, dict)
    print(f"simulated {summary['skill']} for {args.duration} s "
          f"({summary['ticks']} ticks of {summary['tick_s']} s)")
    for name, row in cons.items():
        print(f"  {name:24s} final error {_number(row['final_error'])}  max slack "
              f"{_number(row['max_slack'])}")
    for ev in summary['events']:  # type: ignore[union-attr]
        print(f"  event {ev['event']} at {ev['time_s']:.3f} s")
    watchdog = summary['watchdog']
    assert isinstance(watchdog, dict)
    for stage, tally in watchdog['stages'].items():
        if tally['ticks']:
            print(f"  watchdog {stage}: capped {tally['ticks']} ticks ({tally['seconds']:.3f} s)")
    if watchdog['stopped']['ticks']:
        print(f"  watchdog held the arm for {watchdog['stopped']['ticks']} ticks")
    print('outputs: ' + ', '.join(str(p) for p in written))
    statuses = summary['solve_status_counts']
    assert isinstance(statuses, dict)
    return 0 if set(statuses) <= {'ok'} else 1


def _number(value: object) -> str:
    return 'nan' if value is None else f'{value:.3g}'


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


def _count(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = -1
    if value < 0:
        raise argparse.ArgumentTypeError(f'expected a whole number >= 0, got {text!r}')
    return value


def _priority(text: str) -> int:
    from .runtime.realtime import check_priority
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f'expected an integer from 1 to 99, got {text!r}') \
            from None
    problem = check_priority(value)
    if problem:
        raise argparse.ArgumentTypeError(problem)
    return value


def _bench_sections(args: argparse.Namespace) -> dict:
    sections = {}
    try:
        from .safety.bench import bench_watchdog
        sections['watchdog'] = lambda: bench_watchdog(ticks=3000 if args.quick else 20000)
    except ImportError:  # pragma: no cover - during development only
        pass
    try:
        from .tools.bench_wire import bench_wire
        sections['wire'] = lambda: bench_wire(samples=3000 if args.quick else 20000)
    except ImportError:  # pragma: no cover - without cyclonedds
        pass
    try:
        from .tools.bench_node import bench_end_to_end
        seconds = args.e2e_seconds if args.e2e_seconds is not None else (4.0 if args.quick
                                                                         else 30.0)
        sections['end_to_end'] = lambda: bench_end_to_end(
            duration=seconds, rate_hz=args.e2e_rate, load=args.load,
            transport=args.transport, realtime_priority=args.realtime,
            block_s=1.0 if args.quick else 2.0, activations=4 if args.quick else 20)
    except ImportError:  # pragma: no cover
        pass
    return sections


def _functions(_args: argparse.Namespace) -> int:
    """Every name a formula may use: functions, constants and ``time``."""
    from .skill.formula import CONSTANTS, FUNCTIONS
    print('names (besides the skill\'s own inputs, unknowns, tunables and formulas):')
    print('time -> scalar: seconds since the skill was activated (runs slower or stops while '
          'the watchdog slows or holds the arm)')
    for name, value in sorted(CONSTANTS.items()):
        print(f'{name} -> scalar: the constant {value!r}')
    print('functions:')
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


ROBOT_HELP = ('URDF of the robot for skills that name none (no robot: in the file; the '
              "controller compiles them against its own model); a skill's own robot: wins")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog='constraint-ctrl', description=__doc__.splitlines()[0])
    parser.add_argument('--debug', action='store_true',
                        help='print the full traceback of an unexpected error (before the '
                             'command: constraint-ctrl --debug COMMAND ...)')
    sub = parser.add_subparsers(dest='command', required=True)

    p = sub.add_parser('check', help='validate skill files and inspect them at their start pose')
    p.add_argument('skills', nargs='+', help='skill YAML files')
    p.add_argument('--rate', type=float, default=500.0, metavar='HZ',
                   help="control rate the behaviours are checked against (default: the node's "
                        'rate_hz, 500)')
    p.add_argument('--robot', metavar='FILE', help=ROBOT_HELP)
    p.set_defaults(func=_check)

    p = sub.add_parser('simulate', help='lockstep kinematic simulation of one skill')
    p.add_argument('skill')
    p.add_argument('--duration', type=float, default=5.0, help='simulated seconds')
    p.add_argument('--out', default='out/simulate', help='output folder')
    p.add_argument('--tick', type=float, default=None,
                   help="control period, s (default: the node's, 1 / rate_hz = 0.002)")
    p.add_argument('--params-file', metavar='FILE',
                   help='node parameters file (e.g. config/controller.yaml): watchdog.*, '
                        'people.timeout and rate_hz as the node would use them (default: the '
                        "node's defaults)")
    p.add_argument('--quiet', action='store_true', help='no progress bar')
    p.add_argument('--qp-solver', choices=QP_SOLVER_CHOICES, default='quadprog',
                   help='QP solver of every level (same matrices, same answers)')
    p.add_argument('--robot', metavar='FILE', help=ROBOT_HELP)
    p.set_defaults(func=_simulate)

    p = sub.add_parser('bench', help='measure tick cost, scaling, watchdog and end-to-end latency')
    p.add_argument('--json', help='write the report to this file')
    p.add_argument('--quick', action='store_true', help='fewer samples (for a smoke run)')
    p.add_argument('--no-scaling', action='store_true', help='skip the scaling table')
    p.add_argument('--core-only', action='store_true', help='engine sections only')
    p.add_argument('--e2e-seconds', type=float, default=None,
                   help='end to end: recorded seconds per measured process and part '
                        '(default 30, 4 with --quick)')
    p.add_argument('--e2e-rate', type=float, default=1000.0, help='end to end: joint_states '
                   'rate, Hz (default 1000)')
    p.add_argument('--load', type=_count, default=2, metavar='N',
                   help='end to end: after the quiet part, measure again with N busy-loop '
                        'processes alongside, with and without --realtime (default 2; 0 skips)')
    p.add_argument('--realtime', type=_priority, default=80, metavar='PRIORITY',
                   help="end to end, loaded part: the node's --realtime priority (default 80)")
    p.add_argument('--transport', choices=('dds', 'rclpy', 'both'), default='dds',
                   help="end to end: the measured node's transport (the echo floor uses the "
                        'same; the peer is always DDS); both: a controller and an echo on each, '
                        'interleaved in one run (the loaded part on DDS). rclpy needs a '
                        'sourced ROS 2 install')
    p.add_argument('--qp-solver', choices=QP_SOLVER_CHOICES, default='quadprog',
                   help='QP solver of the example ticks (the scaling table runs both)')
    p.add_argument('--cells', nargs='+', metavar='JxR', type=_cell,
                   help='only these cells of the scaling table, e.g. 6x200 48x200')
    p.set_defaults(func=_bench)

    p = sub.add_parser('functions', help='list the functions of the formula language')
    p.set_defaults(func=_functions)

    _add_bag_and_pose_commands(sub)

    # driving a running node without ROS: call, param, echo (tools/remote.py)
    from .tools.remote import add_commands as add_remote_commands
    add_remote_commands(sub)

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


def report_errors(func, *args, debug: bool | None = None) -> int:  # noqa: ANN001 - any entry
    """Run an entry point; errors become one line on stderr.

    Our own errors (a bad file, a bad argument) exit with 2; any other exception (a bug) with
    1, its traceback printed only with ``debug`` (default: CONSTRAINT_CTRL_DEBUG=1 in the
    environment). Ctrl-C exits with 130; a closed output pipe (``... | head``) quietly with 1.
    """
    if debug is None:
        debug = os.environ.get('CONSTRAINT_CTRL_DEBUG', '') not in ('', '0')
    try:
        return int(func(*args) or 0)
    except ConstraintCtrlError as err:
        if debug:
            traceback.print_exc()
        print(f'error: {err}', file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:
        # Python's documented way: point stdout at devnull so the exit flush does not fail again
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 1
    except Exception as err:  # noqa: BLE001 - the last line of defence of every command
        if debug:
            traceback.print_exc()
        text = ' '.join(str(err).split()) or '(no message)'
        hint = '' if debug else '; run with --debug for the traceback'
        print(f'error: unexpected {type(err).__name__}: {text} (a bug of constraint-ctrl, '
              f'please report it{hint})', file=sys.stderr)
        return 1


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    debug = False
    while argv and argv[0] == '--debug':      # global options come before the command
        debug = True
        argv.pop(0)
    if argv and argv[0] in NODE_COMMANDS:
        return report_errors(_run_node, argv[0], argv[1:], debug=debug or None)
    args = build_parser().parse_args(argv)
    return report_errors(args.func, args, debug=debug or None)


if __name__ == '__main__':
    sys.exit(main())
