"""Small skills built directly as dataclasses for the reference tests (no YAML involved)."""
from __future__ import annotations

from pathlib import Path

from constraint_ctrl.skill.schema import (BehaviourSpec, ConstraintSpec, LimitsSpec,
                                          RegularisationSpec, SkillSpec)

ARM = Path(__file__).resolve().parents[2] / 'config' / 'robots' / 'six_axis_arm.urdf'

SLIDER_URDF = """<robot name="slider">
  <link name="base"/><link name="carriage"/>
  <joint name="slide" type="prismatic"><parent link="base"/><child link="carriage"/>
    <origin xyz="0 0 0" rpy="0 0 0"/><axis xyz="1 0 0"/>
    <limit lower="-10" upper="10" velocity="100" effort="1"/></joint>
</robot>
"""


def slider(tmp_path: Path) -> Path:
    path = tmp_path / 'slider.urdf'
    path.write_text(SLIDER_URDF)
    return path


def first_order(gain: float) -> BehaviourSpec:
    return BehaviourSpec(order=1, gain=gain)


def second_order(omega: float, zeta: float) -> BehaviourSpec:
    return BehaviourSpec(order=2, natural_frequency=omega, damping_ratio=zeta)


def skill(robot: Path, *constraints: ConstraintSpec, damping: float = 0.01,
          name: str = 'test_skill', joint_speed: float | None = None) -> SkillSpec:
    return SkillSpec(name=name, robot=robot, constraints=tuple(constraints),
                     regularisation=RegularisationSpec(damping=damping),
                     limits=LimitsSpec(joint_speed=joint_speed))


def row(name: str, function: str, *, kind: str = 'equal', target: str | float | None = None,
        lower: str | float | None = None, upper: str | float | None = None,
        behaviour: BehaviourSpec | None = None, weight: float = 1.0, hard: bool = False,
        priority: int = 1) -> ConstraintSpec:
    if kind == 'equal' and target is None:
        target = 0.0
    return ConstraintSpec(name=name, function=function, kind=kind, target=target,
                          lower=lower, upper=upper, behaviour=behaviour or first_order(1.0),
                          weight=weight, hard=hard, priority=priority)
