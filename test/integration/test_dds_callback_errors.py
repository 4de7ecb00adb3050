"""An exception in a service or parameter callback of the DDS port is an error reply, not an exit
(issue 8 item 5). Two ports in this process on a random domain over loopback: a server that
spins on its own thread, and a client that calls it as `ros2 service call` / `ros2 param set`
would. The server must answer with an error, log it, and go on serving.
"""
from __future__ import annotations

import random
import threading
from typing import Any
from collections.abc import Iterator

import pytest

pytest.importorskip('cyclonedds')

from constraint_ctrl.transport.port import open_port  # noqa: E402
from domains import in_domain  # noqa: E402

pytestmark = pytest.mark.integration


@pytest.fixture()
def ports() -> Iterator[tuple[Any, Any, list[str], threading.Thread]]:
    with in_domain(str(random.randint(101, 200))):
        server = open_port('dds', 'fragile', ['--ros-args'])
        client = open_port('dds', 'caller', ['--ros-args'])
    logs: list[str] = []
    log = server.log
    server.log = lambda level, text: (logs.append(f'{level}: {text}'), log(level, text))
    calls = {'n': 0}

    def trigger(request: Any, response: Any) -> Any:
        calls['n'] += 1
        if calls['n'] == 1:
            raise RuntimeError('first call trips a bug')
        response.success, response.message = True, f'call {calls["n"]}'
        return response

    def validator(values: dict) -> tuple[bool, str]:
        if values.get('gain') == 13.0:
            raise ValueError('unlucky number')
        return True, ''
    server.create_service(server.types.Trigger, '~/poke', trigger)
    server.declare_parameter('gain', 1.0)
    server.set_parameter_validator(validator)
    spinner = threading.Thread(target=server.spin, daemon=True)
    spinner.start()
    try:
        yield server, client, logs, spinner
    finally:
        client.shutdown()
        server.shutdown()
        spinner.join(10)


def test_a_raising_service_callback_gets_an_error_reply_and_the_port_goes_on(ports) -> None:
    server, client, logs, spinner = ports
    t = client.types
    poke = client.create_client(t.Trigger, '/fragile/poke')
    assert poke.wait_for_service(20.0)
    first = poke.call(t.Trigger.Request(), 10.0)
    assert first is not None and not first.success
    assert 'first call trips a bug' in first.message
    second = poke.call(t.Trigger.Request(), 10.0)
    assert second is not None and second.success and second.message == 'call 2'
    assert spinner.is_alive()
    # counted against the service and its reason kept (the port's fault log, also logged once)
    faults = {name: f for name, f in server.faults().items() if '/fragile/poke' in name}
    assert faults, server.faults()
    (fault,) = faults.values()
    assert fault.callback_errors == 1 and fault.last_error.startswith('RuntimeError')


def test_a_raising_parameter_validator_is_a_refusal(ports) -> None:
    server, client, logs, spinner = ports
    t = client.types
    setter = client.create_client(t.SetParameters, '/fragile/set_parameters')
    assert setter.wait_for_service(20.0)

    def set_gain(value: float) -> Any:
        pv = t.ParameterValue(type=t.ParameterType.PARAMETER_DOUBLE, double_value=value)
        reply = setter.call(t.SetParameters.Request(
            parameters=[t.Parameter(name='gain', value=pv)]), 10.0)
        assert reply is not None
        return reply.results[0]
    bad = set_gain(13.0)
    assert not bad.successful and 'unlucky number' in bad.reason
    good = set_gain(2.0)
    assert good.successful and server.get_parameter('gain').value == 2.0
    assert spinner.is_alive()
