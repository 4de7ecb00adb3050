"""Build the watchdog for a robot model from plain settings (node parameters or a dict).

Settings keys (all optional; SI units) and their defaults are in DEFAULTS; monitored points
default to every moving link's origin plus the tool frame given by ``tool_link``. Each point is a
sphere: a person's separation is measured to its surface.
"""
from __future__ import annotations

from dataclasses import replace
from typing import Any
from collections.abc import Mapping

import numpy as np

from ..errors import ConstraintCtrlError
from ..model.kinematics import RobotModel
from ..safety.separation import SeparationParams
from ..safety.watchdog import MonitoredPoint, Watchdog, WatchdogConfig

DEFAULTS: dict[str, Any] = {
    'human_speed': 1.6,            # m/s, ISO 13855 walking speed
    'reaction_time': 0.1,          # s
    'robot_deceleration': 3.333,   # m/s^2 (1 m/s to rest in 0.3 s)
    'intrusion_distance': 0.208,   # m, ISO 13855 C = 8 (d - 14) mm for d = 40 mm
    'person_uncertainty': 0.1,     # m
    'robot_uncertainty': 0.02,     # m
    'reduced_speed': 0.25,         # m/s at monitored points, ISO 10218-1 reduced speed
    'reduced_zone': 1.5,           # m
    'reduced_mode': False,
    'stopping_time': 0.3,          # s
    'resume_after': 1.0,           # s
    'joint_state_timeout': 0.05,   # s
    'person_timeout': 0.2,         # s
    'joint_acceleration': 10.0,    # rad/s^2 or m/s^2 on the final command
    'tool_link': 'tool_tip',
    'link_radius': 0.08,           # m, sphere around each link origin
    'tool_radius': 0.05,           # m
}


def monitored_points(model: RobotModel, tool_link: str, link_radius: float,
                     tool_radius: float) -> list[MonitoredPoint]:
    """Origins of the links moved by any joint, plus the tool frame (no duplicates)."""
    moving = {j.child for j in model.description.joints if j.kind != 'fixed'}
    points = [MonitoredPoint(link, (0.0, 0.0, 0.0), link_radius)
              for link in model.link_names if link in moving]
    if tool_link not in model.link_names:
        msg = f'watchdog tool_link {tool_link!r} is not a link of the robot'
        raise ConstraintCtrlError(msg)
    points.append(MonitoredPoint(tool_link, (0.0, 0.0, 0.0), tool_radius))
    return points


def watchdog_settings(settings: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """DEFAULTS updated with ``settings``; unknown keys are refused (a typo is not a default)."""
    unknown = sorted(set(settings or {}) - set(DEFAULTS))
    if unknown:
        msg = f'unknown watchdog settings {unknown}; known: {sorted(DEFAULTS)}'
        raise ConstraintCtrlError(msg)
    values = dict(DEFAULTS)
    values.update(settings or {})
    return values


def points_function(model: RobotModel, settings: Mapping[str, Any] | None = None
                    ) -> tuple[list[MonitoredPoint], Any]:
    """The monitored points and their casadi function q -> (P (3, k), J (3k, n)).

    The same function the watchdog of ``build_watchdog`` evaluates, so a tool that explains
    the watchdog's output (simulate's report) sees the very same point velocities.
    """
    values = watchdog_settings(settings)
    points = monitored_points(model, str(values['tool_link']), float(values['link_radius']),
                              float(values['tool_radius']))
    return points, model.points_function([(p.link, p.offset) for p in points])


def build_watchdog(model: RobotModel, dt: float, settings: Mapping[str, Any] | None = None,
                   person_timeouts: Mapping[str, float] | None = None) -> Watchdog:
    values = watchdog_settings(settings)
    separation = replace(SeparationParams(),
                         human_speed=float(values['human_speed']),
                         reaction_time=float(values['reaction_time']),
                         robot_deceleration=float(values['robot_deceleration']),
                         intrusion_distance=float(values['intrusion_distance']),
                         person_uncertainty=float(values['person_uncertainty']),
                         robot_uncertainty=float(values['robot_uncertainty']))
    n = model.n_joints
    velocity = np.where(np.isfinite(model.velocity_limit), model.velocity_limit, 1e3)
    config = WatchdogConfig(
        separation=separation, reduced_speed=float(values['reduced_speed']),
        reduced_zone=float(values['reduced_zone']), reduced_mode=bool(values['reduced_mode']),
        stopping_time=float(values['stopping_time']), resume_after=float(values['resume_after']),
        joint_state_timeout=float(values['joint_state_timeout']),
        person_timeout=float(values['person_timeout']),
        person_timeouts=dict(person_timeouts or {}),
        velocity_limits=velocity,
        acceleration_limits=np.full(n, float(values['joint_acceleration'])),
        lower=model.lower, upper=model.upper, joint_names=tuple(model.joint_names))
    points, fn = points_function(model, values)
    return Watchdog(config, fn, points, dt)


__all__ = ['DEFAULTS', 'build_watchdog', 'monitored_points', 'points_function',
           'watchdog_settings']
