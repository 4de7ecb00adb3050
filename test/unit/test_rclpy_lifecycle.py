"""The rclpy port's managed node, against a stand-in rclpy.lifecycle (rclpy is not installable
here); the real one was driven by hand with `ros2 lifecycle` and `ros2 launch` on a Jazzy core
(README, "A managed node").

What is checked is the mapping: open_port(..., lifecycle=True) makes an
rclpy.lifecycle.LifecycleNode with the same arguments as the plain Node; its on_configure,
on_activate, on_deactivate, on_cleanup, on_shutdown and on_error run the node's steps; a step's
reason becomes TransitionCallbackReturn.FAILURE (and a log line), an exception propagates (rclpy
turns it into ERROR, rclpy 7.1.3 lifecycle/node.py __execute_callback) after a log line; the
node's own requests are LifecycleNode.trigger_<transition>(). The stand-in takes exactly the
parameters of rclpy 7.1.3's LifecycleNode (`node_name, *, enable_communication_interface=True,
**kwargs` passed to Node) and registers the callbacks as its LifecycleNodeMixin does (one per
transition state). TransitionCallbackReturn's values are lifecycle_msgs/msg/Transition's
TRANSITION_CALLBACK_SUCCESS/FAILURE/ERROR (97, 98, 99; checked against rosbags below).
"""
from __future__ import annotations

import enum
import sys
from typing import Any

import pytest
from rosbags.typesys import Stores, get_typestore

from test_rclpy_control_path import FakeNode, _module, rclpy_fake  # noqa: F401 - fixture


class TransitionCallbackReturn(enum.Enum):
    SUCCESS = 97
    FAILURE = 98
    ERROR = 99


class RCLError(RuntimeError):
    pass


# (start state, goal on SUCCESS, goal on FAILURE) of the requests (the managed-node design)
_REQUESTS = {'configure': ({'unconfigured'}, 'inactive', 'unconfigured'),
             'activate': ({'inactive'}, 'active', 'inactive'),
             'deactivate': ({'active'}, 'inactive', 'active'),
             'cleanup': ({'inactive'}, 'unconfigured', 'inactive'),
             'shutdown': ({'unconfigured', 'inactive', 'active'}, 'finalized', 'finalized')}


class FakeLifecycleNode(FakeNode):
    def __init__(self, node_name: str, *, enable_communication_interface: bool = True,
                 **kwargs: Any) -> None:
        super().__init__(node_name, **kwargs)
        self.state = 'unconfigured'
        self._callbacks = {'configure': self.on_configure, 'activate': self.on_activate,
                           'deactivate': self.on_deactivate, 'cleanup': self.on_cleanup,
                           'shutdown': self.on_shutdown, 'error': self.on_error}

    def _execute(self, step: str) -> TransitionCallbackReturn:
        try:
            return self._callbacks[step](self.state)
        except Exception:  # noqa: BLE001 - as rclpy: an exception is ERROR
            return TransitionCallbackReturn.ERROR

    def _change(self, label: str) -> TransitionCallbackReturn:
        starts, success, failure = _REQUESTS[label]
        if self.state not in starts:
            msg = f'no {label} from {self.state}'
            raise RCLError(msg)
        result = self._execute(label)
        if result == TransitionCallbackReturn.ERROR:
            error = self._execute('error')
            self.state = ('unconfigured' if error == TransitionCallbackReturn.SUCCESS
                          else 'finalized')
        else:
            self.state = success if result == TransitionCallbackReturn.SUCCESS else failure
        return result

    def trigger_configure(self) -> TransitionCallbackReturn:
        return self._change('configure')

    def trigger_activate(self) -> TransitionCallbackReturn:
        return self._change('activate')

    def trigger_deactivate(self) -> TransitionCallbackReturn:
        return self._change('deactivate')

    def trigger_cleanup(self) -> TransitionCallbackReturn:
        return self._change('cleanup')

    def trigger_shutdown(self) -> TransitionCallbackReturn:
        return self._change('shutdown')

    # LifecycleNodeMixin's defaults (overridden by the port's subclass)
    def on_configure(self, state: Any) -> TransitionCallbackReturn:
        return TransitionCallbackReturn.SUCCESS

    on_activate = on_deactivate = on_cleanup = on_shutdown = on_error = on_configure


@pytest.fixture
def lifecycle_fake(rclpy_fake: str, monkeypatch: pytest.MonkeyPatch) -> str:  # noqa: F811
    monkeypatch.setitem(sys.modules, 'rclpy.lifecycle', _module(
        'rclpy.lifecycle', LifecycleNode=FakeLifecycleNode,
        TransitionCallbackReturn=TransitionCallbackReturn))
    return rclpy_fake


def _port() -> Any:
    from constraint_ctrl.transport.rclpy_port import RclpyPort
    return RclpyPort('constraint_controller', ['--ros-args'], lifecycle=True)


def test_callback_results_are_lifecycle_msgs_constants() -> None:
    consts, _ = get_typestore(Stores.ROS2_JAZZY).fielddefs['lifecycle_msgs/msg/Transition']
    values = {name: value for name, _, value in consts}
    for member in TransitionCallbackReturn:
        assert values[f'TRANSITION_CALLBACK_{member.name}'] == member.value


def test_managed_node_runs_the_steps(lifecycle_fake: str) -> None:
    port = _port()
    node = port.node
    assert isinstance(node, FakeLifecycleNode) and port.native_lifecycle
    assert node.name == 'constraint_controller'
    calls: list[str] = []
    reason: dict[str, str | None] = {'configure': 'no skills folder'}

    def step(name: str) -> Any:
        def run() -> str | None:
            calls.append(name)
            return reason.get(name)
        return run
    lifecycle = port.serve_lifecycle({n: step(n) for n in ('configure', 'activate',
                                                             'deactivate', 'cleanup',
                                                             'shutdown', 'error')})
    lines: list[str] = node.log_lines
    assert not lifecycle.trigger('configure')                 # FAILURE: stays unconfigured
    assert node.state == 'unconfigured'
    assert any('configure failed: no skills folder' in line for line in lines), lines
    reason.clear()
    assert lifecycle.trigger('configure') and lifecycle.trigger('activate')
    assert node.state == 'active'
    assert not lifecycle.trigger('cleanup')                  # not from active: refused, no raise
    assert node.state == 'active'
    assert lifecycle.trigger('deactivate') and lifecycle.trigger('shutdown')
    assert node.state == 'finalized'
    assert calls == ['configure', 'configure', 'activate', 'deactivate', 'shutdown']


def test_a_raising_step_is_a_transition_error(lifecycle_fake: str) -> None:
    port = _port()
    errors: list[str] = []

    def broken() -> str | None:
        msg = 'bug in configure'
        raise RuntimeError(msg)
    lifecycle = port.serve_lifecycle({'configure': broken,
                                      'error': lambda: errors.append('error') or None})
    assert not lifecycle.trigger('configure')
    assert errors == ['error'] and port.node.state == 'unconfigured'
    assert any('bug in configure' in line for line in port.node.log_lines)


def test_plain_port_has_no_lifecycle(lifecycle_fake: str) -> None:
    from constraint_ctrl.errors import TransportError
    from constraint_ctrl.transport.rclpy_port import RclpyPort
    port = RclpyPort('constraint_controller', ['--ros-args'])
    assert not port.native_lifecycle and not isinstance(port.node, FakeLifecycleNode)
    with pytest.raises(TransportError, match='lifecycle=True'):
        port.serve_lifecycle({})
