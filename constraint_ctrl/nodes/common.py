"""What every node entry point shares: option parsing, the config folder, the port's life."""
from __future__ import annotations

import argparse
import gc
import sys
from typing import Any
from collections.abc import Callable
from pathlib import Path

from ..transport.port import DISTRO_CHOICES, TRANSPORTS
from ..transport.signals import ignore_stop_signals


def config_dir() -> Path:
    """The package's config folder: ament share dir, pip data dir, or the source tree."""
    candidates = []
    try:
        from ament_index_python.packages import (PackageNotFoundError,
                                                 get_package_share_directory)
        try:
            candidates.append(Path(get_package_share_directory('constraint_ctrl')) / 'config')
        except PackageNotFoundError:
            pass
    except ImportError:
        pass
    here = Path(__file__).resolve()
    candidates.append(here.parents[2] / 'config')                 # source tree / editable
    # a colcon install: <prefix>/lib/pythonX.Y/site-packages/constraint_ctrl/nodes/common.py
    if len(here.parents) > 5:
        candidates.append(here.parents[5] / 'share' / 'constraint_ctrl' / 'config')
    candidates.append(Path(sys.prefix) / 'share' / 'constraint_ctrl' / 'config')
    for path in candidates:
        if (path / 'robots').is_dir():
            return path
    return candidates[-1]


def serve(port: Any, build: Callable[[], Any]) -> Any | None:
    """Build a node on ``port``, spin until shutdown or SIGINT/SIGTERM, then close node and port.

    ``close()`` of the node runs after spin() has returned (callbacks no longer run) and before
    the port goes away, so it can still publish its final zero command. Returns the node.
    For process entry points: once the shutdown has begun, SIGINT and SIGTERM are ignored until
    the process ends, so a second signal (``ros2 launch``, a terminal's Ctrl-C) can neither
    leave a bag without metadata nor turn the exit code into 130.
    """
    node = None
    try:
        node = build()
        gc.collect()
        gc.freeze()   # start-up objects leave the collector's work: fewer, shorter pauses
        port.spin()
    except KeyboardInterrupt:
        pass          # SIGINT before spin() took over the signal: a normal stop
    finally:
        ignore_stop_signals()
        if node is not None:
            node.close()
        port.shutdown()
    return node


def split_ros_args(argv: list[str]) -> tuple[list[str], list[str]]:
    """(our options, ROS arguments from --ros-args on) — ROS arguments go to the port as is."""
    if '--ros-args' in argv:
        i = argv.index('--ros-args')
        return argv[:i], argv[i:]
    return argv, []


def transport_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument('--transport', choices=TRANSPORTS, default='auto',
                        help='auto: rclpy when importable, else direct Cyclone DDS')
    parser.add_argument('--distro', choices=DISTRO_CHOICES, default='auto',
                        help='ROS 2 message layouts and bag format; auto: the installed ROS 2 '
                             'on rclpy, jazzy on the DDS transport')


ROS_ARGUMENTS_HELP = """\
ROS arguments (everything after --ros-args goes to the node, as with ros2 run; the same on
the DDS transport and on rclpy):
  -p NAME:=VALUE       set a parameter; VALUE is YAML: 250.0 is a double, 250 an integer
  --params-file FILE   a ROS 2 parameters file; a -p after it overrides the file
  -r FROM:=TO          remap a name (-r __node:=NAME and -r __ns:=/NS rename the node)
  --log-level LEVEL    debug, info, warn or error"""


def ros_arguments(parser: argparse.ArgumentParser, epilog: str) -> None:
    """Show `--ros-args ...` in a node command's usage and help, with what may follow it and
    ``epilog`` (the node's parameters, an example). The command splits the ROS arguments off
    before parsing (split_ros_args), so this option only documents them."""
    parser.add_argument('--ros-args', nargs=argparse.REMAINDER, metavar='ARG',
                        help='ROS arguments for the node (see below)')
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.epilog = ROS_ARGUMENTS_HELP + '\n\n' + epilog


__all__ = ['ROS_ARGUMENTS_HELP', 'config_dir', 'ros_arguments', 'serve', 'split_ros_args',
           'transport_options']
