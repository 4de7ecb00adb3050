"""Skills: the skill file format, its loader and the validated spec it produces.

A skill file is YAML (format in ``loader``'s docstring); ``load_skill`` turns it into a
``SkillSpec`` whose every field knows its line, so later stages can point at the file too.
"""
from .loader import load_skill, load_skill_text
from .schema import (
    BehaviourSpec,
    ConstraintSpec,
    EventSpec,
    UnknownSpec,
    InputSpec,
    LimitsSpec,
    OfflineSpec,
    RegularisationSpec,
    SkillSpec,
    TunableSpec,
)

__all__ = [
    'BehaviourSpec',
    'ConstraintSpec',
    'EventSpec',
    'UnknownSpec',
    'InputSpec',
    'LimitsSpec',
    'OfflineSpec',
    'RegularisationSpec',
    'SkillSpec',
    'TunableSpec',
    'load_skill',
    'load_skill_text',
]
