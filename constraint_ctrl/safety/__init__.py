"""Safety stage: the watchdog between the solver and the published command.

Middleware-free (numpy + casadi). It enforces joint limits, speed caps and speed and separation
monitoring after ISO/TS 15066:2016 clause 5.5.4, and stops on stale or broken inputs. It is a
supervisory layer for development and testing, not a certified safety function.
"""
from constraint_ctrl.safety.faults import RECOVERY, Fault, FaultKind, Recovery
from constraint_ctrl.safety.separation import (
    SeparationParams, max_robot_speed, protective_distance, standstill_distance)
from constraint_ctrl.safety.states import State, Transition
from constraint_ctrl.safety.watchdog import (
    MonitoredPoint, PersonSample, Watchdog, WatchdogConfig, WatchdogInput, WatchdogOutput)

__all__ = [
    'RECOVERY',
    'Fault',
    'FaultKind',
    'MonitoredPoint',
    'PersonSample',
    'Recovery',
    'SeparationParams',
    'State',
    'Transition',
    'Watchdog',
    'WatchdogConfig',
    'WatchdogInput',
    'WatchdogOutput',
    'max_robot_speed',
    'protective_distance',
    'standstill_distance',
]
