"""What every node entry point shares: option parsing, the config folder, the port's life."""
from __future__ import annotations

import argparse
import gc
import sys
from typing import Any, Callable
from pathlib import Path

from ..transport.port import DISTROS, TRANSPORTS


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
    """Build a node on ``port``, spin until shutdown or SIGINT, then close node and port.

    ``close()`` of the node runs after spin() has returned (callbacks no longer run) and before
    the port goes away, so it can still publish its final zero command. Returns the node.
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
    parser.add_argument('--distro', choices=DISTROS, default='jazzy',
                        help='ROS 2 wire layout for the DDS transport and bags')


__all__ = ['config_dir', 'serve', 'split_ros_args', 'transport_options']
