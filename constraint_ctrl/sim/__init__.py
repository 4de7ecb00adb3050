"""Simulated work cells: scene file, flange surface, gear contact, screw joint, curved panel,
operator, World.

Middleware-free; a node publishes what ``World`` reports.
"""
from .flange import FlangeSurface
from .gear_contact import GearContact, GearContactResult, GearPhase
from .operator import Operator, OperatorPath
from .panel_contact import PanelContact, PanelResult
from .scene import PanelSpec, Scene, SceneError, ScrewSpec, load_scene
from .screw_joint import ScrewJoint, ScrewResult
from .world import GearState, RangeReading, SimError, StepReport, World

__all__ = ['FlangeSurface', 'GearContact', 'GearContactResult', 'GearPhase', 'GearState',
           'Operator', 'OperatorPath', 'PanelContact', 'PanelResult', 'PanelSpec',
           'RangeReading', 'Scene', 'SceneError', 'ScrewJoint', 'ScrewResult', 'ScrewSpec',
           'SimError', 'StepReport', 'World', 'load_scene']
