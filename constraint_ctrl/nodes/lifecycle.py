"""A node's lifecycle on either port: the standard managed-node services and events.

`serve_lifecycle(port, steps)` makes the node a ROS 2 managed node whose transitions run
``steps`` (configure, activate, deactivate, cleanup, shutdown, error: each returns None, or the
reason it failed, or raises for an error):

* on rclpy (port.native_lifecycle) the node is an rclpy.lifecycle.LifecycleNode and rcl runs
  the state machine and its services (transport/rclpy_port.py);
* on the DDS port, LifecycleServer below runs runtime/lifecycle.py's machine and serves what
  rcl_lifecycle serves, with the same names, types and QoS: ~/change_state
  (lifecycle_msgs/srv/ChangeState), ~/get_state, ~/get_available_states,
  ~/get_available_transitions, ~/get_transition_graph (services_default QoS) and
  ~/transition_event (lifecycle_msgs/msg/TransitionEvent, the default QoS: reliable,
  volatile, keep last 10), one event per move (request, then its outcome). Unlike rcl 9.2.0,
  whose events leave `transition` and `timestamp` zero, ours carry the transition taken and the
  node clock's time in ns, as the message definition describes them.

Either way `ros2 lifecycle nodes/get/list/set` and launch_ros' lifecycle events work, and the
returned object's `trigger(label)` runs a transition from the node itself (--autostart).
A failed step's reason goes to the log (ChangeState's reply has only `success`).
"""
from __future__ import annotations

import threading
from collections.abc import Callable, Mapping
from typing import Any, Protocol

from ..runtime.lifecycle import LifecycleMachine, LifecycleState, LifecycleTransition

Step = Callable[[], 'str | None']


class Lifecycle(Protocol):
    def trigger(self, label: str) -> bool:
        """Run the transition ``label`` from the current state; True when its step
        succeeded (False also when it is not available from the current state)."""


def serve_lifecycle(port: Any, steps: Mapping[str, Step]) -> Lifecycle:
    if getattr(port, 'native_lifecycle', False):
        return port.serve_lifecycle(dict(steps))
    return LifecycleServer(port, steps)


class LifecycleServer:
    """The managed-node services and events over a port's own services and publisher."""

    def __init__(self, port: Any, steps: Mapping[str, Step]) -> None:
        self.port = port
        t = port.types
        self._events = port.create_publisher(t.TransitionEvent, '~/transition_event', 'default')
        self.machine = LifecycleMachine(steps, self._publish_event)
        self._lock = threading.Lock()      # the node's own triggers and service calls
        self._services = [
            port.create_service(t.ChangeState, '~/change_state', self._on_change_state),
            port.create_service(t.GetState, '~/get_state', self._on_get_state),
            port.create_service(t.GetAvailableStates, '~/get_available_states',
                                self._on_get_available_states),
            port.create_service(t.GetAvailableTransitions, '~/get_available_transitions',
                                self._on_get_available_transitions),
            port.create_service(t.GetAvailableTransitions, '~/get_transition_graph',
                                self._on_get_transition_graph)]

    @property
    def state(self) -> LifecycleState:
        return self.machine.state

    def trigger(self, label: str) -> bool:
        return self._change(0, label)

    def _change(self, transition_id: int, label: str) -> bool:
        with self._lock:
            outcome = self.machine.change_state(transition_id, label)
        if not outcome.ok:
            asked = label or f'transition {transition_id}'
            self.port.log('warn', f'lifecycle: {asked} failed: {outcome.reason}'
                          f' (state: {outcome.state.label})')
        return outcome.ok

    # --- messages ------------------------------------------------------------------------

    def _state_msg(self, state: LifecycleState) -> Any:
        return self.port.types.State(id=state.id, label=state.label)

    def _description(self, transition: LifecycleTransition) -> Any:
        t = self.port.types
        return t.TransitionDescription(
            transition=t.Transition(id=transition.id, label=transition.label),
            start_state=self._state_msg(transition.start),
            goal_state=self._state_msg(transition.goal))

    def _publish_event(self, transition: LifecycleTransition) -> None:
        t = self.port.types
        self._events.publish(t.TransitionEvent(
            timestamp=max(0, int(self.port.now_ns())),
            transition=t.Transition(id=transition.id, label=transition.label),
            start_state=self._state_msg(transition.start),
            goal_state=self._state_msg(transition.goal)))

    # --- services ------------------------------------------------------------------------

    def _on_change_state(self, request: Any, response: Any) -> Any:
        response.success = self._change(int(request.transition.id),
                                        str(request.transition.label))
        return response

    def _on_get_state(self, request: Any, response: Any) -> Any:
        response.current_state = self._state_msg(self.machine.state)
        return response

    def _on_get_available_states(self, request: Any, response: Any) -> Any:
        response.available_states = [self._state_msg(s)
                                     for s in self.machine.available_states()]
        return response

    def _on_get_available_transitions(self, request: Any, response: Any) -> Any:
        response.available_transitions = [self._description(tr)
                                          for tr in self.machine.available_transitions()]
        return response

    def _on_get_transition_graph(self, request: Any, response: Any) -> Any:
        response.available_transitions = [self._description(tr)
                                          for tr in self.machine.transition_graph()]
        return response


__all__ = ['Lifecycle', 'LifecycleServer', 'serve_lifecycle']
