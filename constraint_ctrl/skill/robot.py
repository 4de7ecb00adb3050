"""The robot model a skill compiles against, with problems located in the skill file.

A skill refers to its robot through two fields, ``robot`` (the URDF) and ``base_link`` (the
frame of its formulas). A URDF that cannot be used, or a base link the URDF lacks, is the skill
file's mistake as far as its author can tell, so it is reported at the field that named it
(file, line, field) rather than as a bare model error.

A skill without ``robot`` drives whatever robot the controller has (its model from a URDF file
or the robot_description topic): it compiles against the ``default`` model its caller gives,
the node's, or the one an offline tool was given with ``--robot FILE``. Without one it cannot
be compiled, and the error says how to give one.
"""
from __future__ import annotations

from ..errors import ModelError
from ..model.kinematics import RobotModel
from ..model.urdf import parse_urdf
from .schema import SkillSpec

#: Where the message for a robot-less skill without a default model points the user.
NO_ROBOT_HINT = ('the skill names no robot (robot: <URDF file>); give the robot with '
                 '--robot FILE, or add robot: to the file')


def robot_model(spec: SkillSpec, default: RobotModel | None = None) -> RobotModel:
    """The skill's URDF in the skill's base link, or (no ``robot:``) ``default`` in it.

    Raises:
        SkillError: located at ``robot`` for an unusable URDF, at ``base_link`` for a link the
            robot does not have, at ``skill`` for a skill without robot and no default.
    """
    if spec.robot is None:
        if default is None:
            raise spec.error(NO_ROBOT_HINT, 'skill')
        if spec.base_link is None or spec.base_link == default.base_link:
            return default
        try:
            return RobotModel(default.description, spec.base_link)
        except ModelError as err:
            raise spec.error(str(err), 'base_link') from None
    try:
        description = parse_urdf(spec.robot)
    except ModelError as err:
        raise spec.error(str(err), 'robot') from None
    try:
        return RobotModel(description, spec.base_link)
    except ModelError as err:
        field = 'base_link' if spec.base_link not in (None, *description.links) else 'robot'
        raise spec.error(str(err), field) from None


__all__ = ['NO_ROBOT_HINT', 'robot_model']
