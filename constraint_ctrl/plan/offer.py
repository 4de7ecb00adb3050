"""Does the controller offer what a plan names? Checked once, before the plan's first step.

A step naming a skill the controller has not loaded, or a tunable its skill lacks, would
otherwise be found out only when the sequencer reaches that step, possibly minutes into the
plan with the arm half-way through an assembly. So the sequencer asks the controller first
(its ~/skills/<skill>/activate services from the ROS graph, its parameter names from
ListParameters; nodes/sequencer_node.py) and this module compares, free of any middleware.

Every problem is located in the plan file (file, line, field) and carries a did-you-mean from
``difflib.get_close_matches`` (Python's standard library, ratio cutoff 0.6) when a close name
exists.
"""
from __future__ import annotations

import difflib
from collections.abc import Collection, Iterable
from dataclasses import dataclass

from ..errors import PlanError
from .plan import HOLD, Plan

#: difflib.get_close_matches's own default: names at least this similar are suggested.
CUTOFF = 0.6


@dataclass(frozen=True, slots=True)
class Offer:
    """What one controller offers: skill names, all its parameter names, whether it serves
    the built-in hold (~/hold)."""

    skills: frozenset[str]
    parameters: frozenset[str]
    hold: bool

    def tunables(self, skill: str) -> list[str]:
        """The skill's tunables (parameters ``<skill>.<tunable>``), sorted."""
        prefix = f'{skill}.'
        return sorted(n[len(prefix):] for n in self.parameters if n.startswith(prefix))


def skills_from_services(controller: str, services: Iterable[str]) -> frozenset[str]:
    """Skill names from the fully qualified service names a node serves
    (``<controller>/skills/<skill>/activate``)."""
    head, tail = f'{controller}/skills/', '/activate'
    return frozenset(s[len(head):-len(tail)] for s in services
                     if s.startswith(head) and s.endswith(tail)
                     and '/' not in s[len(head):-len(tail)])


def did_you_mean(word: str, candidates: Collection[str]) -> str:
    """'; did you mean 'x'?' for the closest candidate, or '' when none is close."""
    close = difflib.get_close_matches(word, list(candidates), n=1, cutoff=CUTOFF)
    return f"; did you mean {close[0]!r}?" if close else ''


def plan_problems(plan: Plan, offer: Offer) -> list[PlanError]:
    """Every step whose skill or tunable the controller does not offer, located, in plan order;
    also a controller without ~/hold (every plan ends in hold)."""
    problems: list[PlanError] = []
    if not offer.hold:
        problems.append(plan.error(
            f'the controller {plan.controller} does not serve {plan.controller}/{HOLD}, the '
            'built-in hold every plan ends in (a controller older than the sequencer?)',
            'controller'))
    names = sorted(offer.skills) + [HOLD]
    for i, step in enumerate(plan.steps):
        where = f'steps[{step.index if step.index is not None else i}]'
        if step.skill == HOLD:
            continue
        if step.skill not in offer.skills:
            problems.append(plan.error(
                f'the controller {plan.controller} offers no skill {step.skill!r}'
                f'{did_you_mean(step.skill, names)} (it offers: {", ".join(names)})',
                f'{where}.skill'))
            continue
        tunables = offer.tunables(step.skill)
        settable = [n for n in tunables if '.' not in n]   # a plan names plain tunables only
        for name in step.set:
            if name not in tunables:
                problems.append(plan.error(
                    f'skill {step.skill!r} has no tunable {name!r}{did_you_mean(name, tunables)}'
                    f' (its tunables: {", ".join(settable) or "none"})', f'{where}.set.{name}'))
    return problems


def combined(problems: list[PlanError]) -> PlanError:
    """One error for all problems: the first located as usual, each further one on a line of
    its own (file:line: field: message)."""
    first = problems[0]
    rest = ''.join(f'\n{p}' for p in problems[1:])
    return PlanError(first.message + rest, file=first.file, line=first.line, field=first.field)


__all__ = ['CUTOFF', 'Offer', 'combined', 'did_you_mean', 'plan_problems',
           'skills_from_services']
