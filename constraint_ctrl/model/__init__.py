"""Robot model: URDF parsing and symbolic (CasADi) forward kinematics."""
from .kinematics import RobotModel
from .urdf import JointSpec, RobotDescription, parse_urdf, parse_urdf_string

__all__ = ['JointSpec', 'RobotDescription', 'RobotModel', 'parse_urdf', 'parse_urdf_string']
