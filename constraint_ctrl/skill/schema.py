"""Plain data of a loaded skill file (validated structure, formulas still as text).

The loader (skill/loader.py) builds these from YAML and records the line of every field in
``SkillSpec.locations`` so that later stages (formula parsing, compilation) can still point the
user at the exact place in the file.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Literal
from collections.abc import Mapping

from ..errors import SkillError

ConstraintKind = Literal['equal', 'at_most', 'at_least', 'within']
CONSTRAINT_KINDS: tuple[str, ...] = ('equal', 'at_most', 'at_least', 'within')

#: A number, or the text of a formula / the name of a tunable.
Value = float | str


@dataclass(frozen=True, slots=True)
class InputSpec:
    """A named scalar sensor signal the skill reads (mapped to a topic by the node)."""

    name: str
    unit: str = ''
    rate_hz: float = 50.0
    timeout: float = 0.1  # s; older samples count as stale


@dataclass(frozen=True, slots=True)
class UnknownSpec:
    """An extra unknown of the task, integrated from its velocity like a joint."""

    name: str
    start: float = 0.0
    lower: float = float('-inf')
    upper: float = float('inf')
    max_speed: float = 1.0
    unit: str = ''


@dataclass(frozen=True, slots=True)
class TunableSpec:
    """A value meant to be changed at run time (node parameter ``<skill>.<name>``)."""

    name: str
    value: float
    lower: float = float('-inf')
    upper: float = float('inf')
    unit: str = ''
    description: str = ''


@dataclass(frozen=True, slots=True)
class BehaviourSpec:
    """How the task function is driven: de/dt = -K e, or a damped second-order response."""

    order: Literal[1, 2] = 1
    gain: Value = 1.0               # order 1, 1/s
    natural_frequency: Value = 1.0  # order 2, rad/s
    damping_ratio: Value = 1.0      # order 2, dimensionless


@dataclass(frozen=True, slots=True)
class ConstraintSpec:
    """One task function and the behaviour asked of it."""

    name: str
    function: str
    kind: ConstraintKind = 'equal'
    target: Value | None = None     # kind == 'equal'
    lower: Value | None = None      # kind in ('at_least', 'within')
    upper: Value | None = None      # kind in ('at_most', 'within')
    behaviour: BehaviourSpec = field(default_factory=BehaviourSpec)
    hard: bool = False
    weight: Value = 1.0
    priority: int = 1               # 1 is the most important level


@dataclass(frozen=True, slots=True)
class EventSpec:
    """A boolean condition that must hold for ``hold_for`` seconds to raise the named event."""

    name: str
    condition: str
    hold_for: float = 0.0


@dataclass(frozen=True, slots=True)
class LimitsSpec:
    """Per-skill motion limits; the tighter of these and the URDF's limits applies."""

    joint_speed: float | None = None                     # rad/s or m/s, every joint
    joint_speeds: Mapping[str, float] = field(default_factory=dict)
    joint_acceleration: float | None = None              # rad/s^2 or m/s^2, every joint
    position_gain: float = 5.0                           # 1/s, first-order rows of position limits


@dataclass(frozen=True, slots=True)
class RegularisationSpec:
    """Weights of the velocity regularisation: damping**2 * sum(w_j * qdot_j**2)."""

    damping: float = 0.01
    joint_weights: Mapping[str, float] = field(default_factory=dict)
    unknown_weight: float = 1.0


@dataclass(frozen=True, slots=True)
class OfflineSpec:
    """Conditions for the offline tools (check, simulate); ignored by the controller node."""

    start: Mapping[str, float] = field(default_factory=dict)   # joint name -> position
    inputs: Mapping[str, float] = field(default_factory=dict)  # input name -> constant value
    scene: Path | None = None                                  # resolved scene file, if any


@dataclass(frozen=True, slots=True)
class SkillSpec:
    """A whole skill file, validated for structure; formulas are compiled later."""

    name: str
    robot: Path | None = None           # resolved URDF path; None: the node's model
    source: str = '<string>'            # file the spec came from
    description: str = ''
    base_link: str | None = None
    inputs: tuple[InputSpec, ...] = ()
    unknowns: tuple[UnknownSpec, ...] = ()
    tunables: tuple[TunableSpec, ...] = ()
    formulas: tuple[tuple[str, str], ...] = ()   # (name, formula) in file order
    constraints: tuple[ConstraintSpec, ...] = ()
    events: tuple[EventSpec, ...] = ()
    limits: LimitsSpec = field(default_factory=LimitsSpec)
    regularisation: RegularisationSpec = field(default_factory=RegularisationSpec)
    offline: OfflineSpec = field(default_factory=OfflineSpec)
    locations: Mapping[str, int] = field(default_factory=dict)  # field path -> 1-based line

    def line_of(self, field_path: str) -> int | None:
        """Line of a field, falling back to its nearest parent that has one."""
        path = field_path
        while path:
            if path in self.locations:
                return self.locations[path]
            cut = max(path.rfind('.'), path.rfind('['))
            path = path[:cut] if cut > 0 else ''
        return None

    def error(self, message: str, field_path: str) -> SkillError:
        """A SkillError located at ``field_path`` of this spec's file."""
        return SkillError(message, file=self.source, line=self.line_of(field_path),
                          field=field_path)
