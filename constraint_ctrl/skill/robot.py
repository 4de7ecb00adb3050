"""The robot model a skill names, with URDF problems located in the skill file.

A skill refers to its robot through two fields, ``robot`` (the URDF) and ``base_link`` (the
frame of its formulas). A URDF that cannot be used, or a base link the URDF lacks, is the skill
file's mistake as far as its author can tell, so it is reported at the field that named it
(file, line, field) rather than as a bare model error.
"""
from __future__ import annotations

from ..errors import ModelError
from ..model.kinematics import RobotModel
from ..model.urdf import parse_urdf
from .schema import SkillSpec


def robot_model(spec: SkillSpec) -> RobotModel:
    """Parse the skill's URDF and build its model in the skill's base link.

    Raises:
        SkillError: located at ``robot`` for an unusable URDF, at ``base_link`` for a link the
            robot does not have.
    """
    try:
        description = parse_urdf(spec.robot)
    except ModelError as err:
        raise spec.error(str(err), 'robot') from None
    try:
        return RobotModel(description, spec.base_link)
    except ModelError as err:
        field = 'base_link' if spec.base_link not in (None, *description.links) else 'robot'
        raise spec.error(str(err), field) from None


__all__ = ['robot_model']
