"""The managed-node state machine of ROS 2, without any middleware.

States, transitions, their ids and labels are those of lifecycle_msgs/msg/State and
lifecycle_msgs/msg/Transition and of the default state machine every ROS 2 managed node has
(rcl_lifecycle): four primary states (unconfigured, inactive, active, finalized), six
transition states (configuring, cleaningup, shuttingdown, activating, deactivating,
errorprocessing) and 25 transitions. A transition requested from a primary state moves to its
transition state, runs the node's step for it and then takes the transition its outcome names:
``transition_success``, ``transition_failure`` (back where it started; a failed shutdown still
ends in finalized) or ``transition_error`` (an exception in the step: errorprocessing, whose
step decides between unconfigured and finalized). Every one of these moves is reported through
``on_event`` as lifecycle_msgs/msg/TransitionEvent reports it (transition, start, goal).

The DDS transport serves this machine over the standard services (nodes/lifecycle.py); on
rclpy the node is an rclpy.lifecycle.LifecycleNode and rcl runs its own copy of the same table.
"""
from __future__ import annotations

import threading
import traceback
from collections.abc import Callable, Mapping
from dataclasses import dataclass


@dataclass(frozen=True)
class LifecycleState:
    """lifecycle_msgs/msg/State: id and label."""

    id: int
    label: str


@dataclass(frozen=True)
class LifecycleTransition:
    """lifecycle_msgs/msg/TransitionDescription: the transition, its start and goal state."""

    id: int
    label: str
    start: LifecycleState
    goal: LifecycleState


# lifecycle_msgs/msg/State constants and rcl_lifecycle's labels
UNKNOWN = LifecycleState(0, 'unknown')
UNCONFIGURED = LifecycleState(1, 'unconfigured')
INACTIVE = LifecycleState(2, 'inactive')
ACTIVE = LifecycleState(3, 'active')
FINALIZED = LifecycleState(4, 'finalized')
CONFIGURING = LifecycleState(10, 'configuring')
CLEANINGUP = LifecycleState(11, 'cleaningup')
SHUTTINGDOWN = LifecycleState(12, 'shuttingdown')
ACTIVATING = LifecycleState(13, 'activating')
DEACTIVATING = LifecycleState(14, 'deactivating')
ERRORPROCESSING = LifecycleState(15, 'errorprocessing')

#: every state, in the order rcl_lifecycle registers them (GetAvailableStates answers this)
STATES = (UNKNOWN, UNCONFIGURED, INACTIVE, ACTIVE, FINALIZED, CONFIGURING, CLEANINGUP,
          SHUTTINGDOWN, ACTIVATING, DEACTIVATING, ERRORPROCESSING)

SUCCESS = 'transition_success'
FAILURE = 'transition_failure'
ERROR = 'transition_error'

_T = LifecycleTransition
#: the transition graph (lifecycle_msgs/msg/Transition ids), in rcl_lifecycle's order
TRANSITIONS = (
    _T(1, 'configure', UNCONFIGURED, CONFIGURING),
    _T(10, SUCCESS, CONFIGURING, INACTIVE),
    _T(11, FAILURE, CONFIGURING, UNCONFIGURED),
    _T(12, ERROR, CONFIGURING, ERRORPROCESSING),
    _T(2, 'cleanup', INACTIVE, CLEANINGUP),
    _T(20, SUCCESS, CLEANINGUP, UNCONFIGURED),
    _T(21, FAILURE, CLEANINGUP, INACTIVE),
    _T(22, ERROR, CLEANINGUP, ERRORPROCESSING),
    _T(3, 'activate', INACTIVE, ACTIVATING),
    _T(30, SUCCESS, ACTIVATING, ACTIVE),
    _T(31, FAILURE, ACTIVATING, INACTIVE),
    _T(32, ERROR, ACTIVATING, ERRORPROCESSING),
    _T(4, 'deactivate', ACTIVE, DEACTIVATING),
    _T(40, SUCCESS, DEACTIVATING, INACTIVE),
    _T(41, FAILURE, DEACTIVATING, ACTIVE),
    _T(42, ERROR, DEACTIVATING, ERRORPROCESSING),
    _T(5, 'shutdown', UNCONFIGURED, SHUTTINGDOWN),
    _T(6, 'shutdown', INACTIVE, SHUTTINGDOWN),
    _T(7, 'shutdown', ACTIVE, SHUTTINGDOWN),
    _T(50, SUCCESS, SHUTTINGDOWN, FINALIZED),
    _T(51, FAILURE, SHUTTINGDOWN, FINALIZED),
    _T(52, ERROR, SHUTTINGDOWN, ERRORPROCESSING),
    _T(60, SUCCESS, ERRORPROCESSING, UNCONFIGURED),
    _T(61, FAILURE, ERRORPROCESSING, FINALIZED),
    _T(62, ERROR, ERRORPROCESSING, FINALIZED),
)
del _T

#: the node's step for each transition state (the names of rclpy.lifecycle's callbacks
#: without 'on_'): configure, cleanup, shutdown, activate, deactivate, error
STEP_OF_STATE = {CONFIGURING.id: 'configure', CLEANINGUP.id: 'cleanup',
                 SHUTTINGDOWN.id: 'shutdown', ACTIVATING.id: 'activate',
                 DEACTIVATING.id: 'deactivate', ERRORPROCESSING.id: 'error'}

#: A step returns None when it succeeded, or the reason it failed; an exception is an error.
Step = Callable[[], 'str | None']
EventSink = Callable[[LifecycleTransition], None]


@dataclass(frozen=True)
class Outcome:
    """What a requested transition did: ok (its step succeeded), the state it ended in, and
    why it failed (the step's reason, the exception, or why it could not start)."""

    ok: bool
    state: LifecycleState
    reason: str = ''


class LifecycleMachine:
    """The current state and the transitions out of it; one transition at a time.

    ``steps`` maps step names (STEP_OF_STATE values) to the node's callables; a missing step
    succeeds. ``on_event`` is called with every transition taken, after the state changed.
    """

    def __init__(self, steps: Mapping[str, Step], on_event: EventSink | None = None) -> None:
        unknown = set(steps) - set(STEP_OF_STATE.values())
        if unknown:
            msg = f'unknown lifecycle steps {sorted(unknown)}; known: ' \
                  f'{sorted(STEP_OF_STATE.values())}'
            raise ValueError(msg)
        self._steps = dict(steps)
        self._on_event = on_event
        self._state = UNCONFIGURED
        self._busy = threading.Lock()

    @property
    def state(self) -> LifecycleState:
        return self._state

    def available_transitions(self) -> list[LifecycleTransition]:
        """Those starting in the current state (GetAvailableTransitions)."""
        state = self._state
        return [t for t in TRANSITIONS if t.start == state]

    @staticmethod
    def available_states() -> list[LifecycleState]:
        return list(STATES)

    @staticmethod
    def transition_graph() -> list[LifecycleTransition]:
        return list(TRANSITIONS)

    def find(self, transition_id: int = 0, label: str = '') -> LifecycleTransition | None:
        """The transition out of the current state with this label (when given) or id, as
        ChangeState picks it: a label wins over the id."""
        for t in self.available_transitions():
            if (t.label == label) if label else (t.id == transition_id):
                return t
        return None

    def change_state(self, transition_id: int = 0, label: str = '') -> Outcome:
        """Run a transition requested by id or label (ChangeState, `ros2 lifecycle set`)."""
        if not self._busy.acquire(blocking=False):
            return Outcome(False, self._state, 'another transition is running')
        try:
            transition = self.find(transition_id, label)
            if transition is None:
                asked = repr(label) if label else f'id {transition_id}'
                known = ', '.join(f'{t.label} [{t.id}]' for t in self.available_transitions())
                return Outcome(False, self._state, f'no transition {asked} from '
                               f'{self._state.label} (available: {known or "none"})')
            return self._run(transition)
        finally:
            self._busy.release()

    def _take(self, transition: LifecycleTransition) -> None:
        self._state = transition.goal
        if self._on_event is not None:
            self._on_event(transition)

    def _result(self, label: str) -> None:
        found = self.find(label=label)
        assert found is not None, f'{label} missing from {self._state.label}'
        self._take(found)

    def _call(self) -> tuple[str, str]:
        """Run the step of the current (transition) state: (result label, reason)."""
        step = self._steps.get(STEP_OF_STATE[self._state.id])
        if step is None:
            return SUCCESS, ''
        try:
            reason = step()
        except Exception as exc:  # noqa: BLE001 - rclpy.lifecycle: an exception is an ERROR
            return ERROR, f'{exc!r}\n{traceback.format_exc()}'
        return (SUCCESS, '') if reason is None else (FAILURE, str(reason))

    def _run(self, transition: LifecycleTransition) -> Outcome:
        self._take(transition)
        result, reason = self._call()
        self._result(result)
        if result == ERROR:
            error_result, error_reason = self._call()
            self._result(error_result)
            if error_reason:
                reason += f'; error processing failed too: {error_reason}'
        return Outcome(result == SUCCESS, self._state, reason)


__all__ = ['ACTIVATING', 'ACTIVE', 'CLEANINGUP', 'CONFIGURING', 'DEACTIVATING', 'ERROR',
           'ERRORPROCESSING', 'FAILURE', 'FINALIZED', 'INACTIVE', 'LifecycleMachine',
           'LifecycleState', 'LifecycleTransition', 'Outcome', 'SHUTTINGDOWN', 'STATES',
           'STEP_OF_STATE', 'SUCCESS', 'TRANSITIONS', 'UNCONFIGURED', 'UNKNOWN']
