"""The package's own exception hierarchy.

Foreign exceptions (yaml, xml, casadi, quadprog, cyclonedds) are translated where they enter,
so a caller only ever has to catch ConstraintCtrlError or one of its subclasses.
"""
from __future__ import annotations


class ConstraintCtrlError(Exception):
    """Base class of every error this package raises on purpose."""


class ModelError(ConstraintCtrlError):
    """A robot description (URDF) that cannot be used; the message names the element."""


class LocatedError(ConstraintCtrlError):
    """A mistake in a user's file: carries file, line (1-based) and dotted field path
    (e.g. ``constraints[2].behaviour.gain``) so the user can go straight to it.
    """

    def __init__(self, message: str, *, file: str | None = None, line: int | None = None,
                 field: str | None = None) -> None:
        self.message = message
        self.file = file
        self.line = line
        self.field = field
        super().__init__(self.__str__())

    def located(self, *, file: str | None = None, line: int | None = None,
                field: str | None = None) -> LocatedError:
        """Return a copy with missing location parts filled in (keeps the most specific)."""
        return type(self)(self.message, file=self.file or file, line=self.line or line,
                          field=self.field or field)

    def __str__(self) -> str:
        where = ''
        if self.file:
            where = self.file + (f':{self.line}' if self.line else '') + ': '
        elif self.line:
            where = f'line {self.line}: '
        what = f'{self.field}: ' if self.field else ''
        return f'{where}{what}{self.message}'


class SkillError(LocatedError):
    """A skill file that cannot be loaded or compiled."""


class PlanError(LocatedError):
    """A task plan file of the sequencer that cannot be loaded."""


class FormulaError(SkillError):
    """A formula that is not in the language, or names something that does not exist."""


class SolverError(ConstraintCtrlError):
    """A QP that was malformed (a bug); infeasible problems are reported as data, not raised."""


class TransportError(ConstraintCtrlError):
    """A middleware problem: transport unavailable, bad ROS arguments, bad parameters file."""
