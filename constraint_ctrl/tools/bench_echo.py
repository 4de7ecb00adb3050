"""The floor of the end-to-end benchmark: a plain echo on the same transport, no control work.

`python -m constraint_ctrl.tools.bench_echo [--transport dds|rclpy] [--realtime P] --ros-args
...` starts a node (default name `echo_floor`) that does what the controller does on the wire
and nothing else: it receives joint_states (sensor data QoS, the same subscription as the
controller's) and answers every sample at once with the two messages the controller publishes
per tick, ~/command (std_msgs/Float64MultiArray, layout dim `joint_velocity`) and
~/joint_command (sensor_msgs/JointState with the names, the sample's stamp and one velocity
per joint), on the same QoS. The messages are built once and only their numbers change, so
the echo costs what the port itself costs: the difference between the controller's round trip
and the echo's is what the controller adds.
"""
from __future__ import annotations

import argparse
from typing import Any

from ..nodes.common import serve, split_ros_args, transport_options
from ..runtime.realtime import RealtimeControl, check_priority, threads_named
from ..transport.port import RECEIVE_THREADS

NODE_NAME = 'echo_floor'


class EchoNode:
    def __init__(self, port: Any, realtime: RealtimeControl | None = None) -> None:
        self.port = port
        self.realtime = realtime
        t = port.types
        names = [f'joint_{i}' for i in range(1, 7)]
        n = len(names)
        self._array = t.Float64MultiArray(
            layout=t.MultiArrayLayout(dim=[t.MultiArrayDimension(label='joint_velocity',
                                                                 size=n, stride=n)],
                                      data_offset=0),
            data=[0.0] * n)
        self._joint = t.JointState(header=t.Header(stamp=t.Time(sec=0, nanosec=0), frame_id=''),
                                   name=names, position=[], velocity=[0.0] * n, effort=[])
        self._pub_command = port.create_publisher(t.Float64MultiArray, '~/command', 'default')
        self._pub_joint = port.create_publisher(t.JointState, '~/joint_command', 'default')
        self.answered = 0
        port.create_subscription(t.JointState, 'joint_states', self._on_joint_states, 'latest',
                                 control=True)   # the controller's own path on either port
        if realtime is not None:
            port.log('info', f'realtime: {realtime.start(threads_named(RECEIVE_THREADS))}')
        port.log('info', f'{NODE_NAME} ready: answers joint_states on ~/command and '
                 '~/joint_command')

    def _on_joint_states(self, msg: Any) -> None:
        if self.realtime is not None:
            line = self.realtime.enter()
            if line:
                self.port.log('info', f'realtime: {line}')
        velocity = list(msg.position)    # as many numbers as the controller's command
        self._array.data = velocity
        self._pub_command.publish(self._array)
        stamp = self._joint.header.stamp
        stamp.sec, stamp.nanosec = msg.header.stamp.sec, msg.header.stamp.nanosec
        self._joint.velocity = velocity
        self._pub_joint.publish(self._joint)
        self.answered += 1

    def close(self) -> None:
        self.port.log('info', f'{NODE_NAME}: answered {self.answered} samples')


def run(argv: list[str]) -> int:
    ours, ros = split_ros_args(argv)
    parser = argparse.ArgumentParser(prog='python -m constraint_ctrl.tools.bench_echo',
                                     description='The echo floor of the end-to-end benchmark.')
    transport_options(parser)
    parser.add_argument('--realtime', type=int, metavar='PRIORITY',
                        help='SCHED_FIFO at this priority for the receive path, and mlockall')
    args = parser.parse_args(ours)
    if args.realtime is not None and check_priority(args.realtime):
        parser.error(check_priority(args.realtime))
    from ..transport.port import open_port
    port = open_port(args.transport, NODE_NAME, ros, distro=args.distro)
    realtime = RealtimeControl(args.realtime) if args.realtime is not None else None
    serve(port, lambda: EchoNode(port, realtime))
    return 0


if __name__ == '__main__':
    import sys

    from ..cli import report_errors
    sys.exit(report_errors(run, sys.argv[1:]))
