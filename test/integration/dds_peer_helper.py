"""A small node on the DDS port, run as a separate process by test_dds_port.py.

It publishes JointState and a command from a 50 Hz timer, serves a Trigger service, declares
parameters with a validator, prints READY once set up, and after spin() returns (SIGTERM)
publishes a final zero command before shutting down - the pattern the real nodes follow.
"""
from __future__ import annotations

import sys
import threading

from constraint_ctrl.transport.port import open_port


def main(argv: list[str]) -> int:
    port = open_port('dds', 'peer', argv)
    t = port.types
    lock = threading.Lock()
    state = {'ticks': 0, 'calls': 0}

    port.declare_parameter('rate_hz', 50.0, description='tick rate in Hz')
    port.declare_parameter('robot_name', 'arm', read_only=True)
    port.declare_parameter('gain', 1.0)
    port.set_parameter_validator(lambda values: (
        all(v > 0 for k, v in values.items() if k in ('rate_hz', 'gain')),
        'rate_hz and gain must be positive'))

    joints = port.create_publisher(t.JointState, 'joint_states', 'sensor')
    command = port.create_publisher(t.Float64, 'cmd', 'default')

    def tick() -> None:
        with lock:
            state['ticks'] += 1
            n = state['ticks']
        joints.publish(t.JointState(
            header=t.Header(stamp=t.Time(sec=port.now_ns() // 10**9), frame_id='base_link'),
            name=['joint_1', 'joint_2'], position=[0.01 * n, -0.01 * n], velocity=[0.5, -0.5]))
        command.publish(t.Float64(data=1.0))

    def trigger(request: object, response: object) -> object:
        with lock:
            state['calls'] += 1
            response.success = True
            response.message = f'call {state["calls"]}'
        return response

    port.create_service(t.Trigger, '~/ping', trigger)
    timer = port.create_timer(0.02, tick)
    print('READY', port.node_name, port.namespace, flush=True)
    port.spin()
    command.publish(t.Float64(data=0.0))     # final zero command after SIGTERM
    port.shutdown()
    print(f'STOPPED ticks={timer.ticks} missed={timer.missed}', flush=True)
    return 0


if __name__ == '__main__':
    sys.exit(main(sys.argv))
