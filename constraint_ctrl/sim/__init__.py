"""Simulated gearbox work cell: scene file, flange surface, gear contact, operator, World.

Middleware-free; a node publishes what ``World`` reports.
"""
from .flange import FlangeSurface
from .gear_contact import GearContact, GearContactResult, GearPhase
from .operator import Operator, OperatorPath
from .scene import Scene, SceneError, load_scene
from .world import GearState, RangeReading, SimError, StepReport, World

__all__ = ['FlangeSurface', 'GearContact', 'GearContactResult', 'GearPhase', 'GearState',
           'Operator', 'OperatorPath', 'RangeReading', 'Scene', 'SceneError', 'SimError',
           'StepReport', 'World', 'load_scene']
