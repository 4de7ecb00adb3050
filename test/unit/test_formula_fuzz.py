"""Hostile and random input to the formula language: only FormulaError ever escapes.

Random text and random expressions from a grammar (valid and invalid pieces mixed) go through
check_formula_syntax and compile_formula; any other exception is a bug. Known code-execution
tricks are also checked for side effects through a sentinel that eval-like evaluation would
reach (a builtin function and a file), and the outcome must be a FormulaError.
"""
from __future__ import annotations

import builtins
from collections.abc import Iterator
from pathlib import Path

import casadi as ca
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from constraint_ctrl.errors import FormulaError
from constraint_ctrl.model.kinematics import RobotModel
from constraint_ctrl.skill.formula import (FUNCTIONS, KIND_SHAPES, FormulaScope, Quantity,
                                           check_formula_syntax, compile_formula)

ARM = Path(__file__).resolve().parents[2] / 'config' / 'robots' / 'six_axis_arm.urdf'
MODEL = RobotModel.from_urdf(ARM)
SCOPE = FormulaScope(
    MODEL,
    {'time': Quantity('scalar', ca.SX.sym('time')), 'x': Quantity('scalar', ca.SX.sym('x')),
     'a': Quantity('vector', ca.SX.sym('a', 3)), 'F': Quantity('frame', ca.SX.sym('F', 4, 4))},
    [MODEL.q], [ca.SX.sym('q_now', MODEL.n_joints)])
FUZZ = settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def compile_only_formula_errors(text: str) -> None:
    """The property: a Quantity of a known kind, or a FormulaError; nothing else."""
    try:
        check_formula_syntax(text)
    except FormulaError:
        pass
    try:
        result = compile_formula(text, SCOPE)
    except FormulaError as exc:
        assert str(exc)   # every rejection says something
        return
    assert result.sx.shape == KIND_SHAPES[result.kind]


@FUZZ
@given(st.text(max_size=120))
def test_random_text_raises_only_formula_errors(text: str) -> None:
    """Arbitrary unicode text (hypothesis)."""
    compile_only_formula_errors(text)


@FUZZ
@given(st.text(alphabet='abxF()[],.+-*/<>=!%~&|^ 0123456789_:"\'lamdpitonr', max_size=80))
def test_operator_soup_raises_only_formula_errors(text: str) -> None:
    """Text built from the language's own characters hits the parser's edge cases."""
    compile_only_formula_errors(text)


LEAVES = st.sampled_from([
    '0', '1', '2.5', '1e-3', '1e999', 'pi', 'time', 'x', 'a', 'F', 'tool_tip', 'joint_3',
    'unknown', 'True', 'None', '"s"', "b'x'", '1j', '...', '__builtins__', 'sin',
])
BINARY = ['+', '-', '*', '/', '**', '<', '<=', '>', '>=', '==', '!=', 'and', 'or', '%', '//',
          '@', '&', '|', '^', '<<', 'is', 'in']
CALLEES = sorted(FUNCTIONS) + ['eval', 'exec', '__import__', 'getattr', 'open', 'print']


def _expressions() -> st.SearchStrategy[str]:
    def extend(inner: st.SearchStrategy[str]) -> st.SearchStrategy[str]:
        return st.one_of(
            st.tuples(inner, st.sampled_from(BINARY), inner).map(
                lambda t: f'({t[0]} {t[1]} {t[2]})'),
            st.tuples(st.sampled_from(['-', '+', 'not ', '~']), inner).map(''.join),
            st.tuples(st.sampled_from(CALLEES), st.lists(inner, max_size=5)).map(
                lambda t: f'{t[0]}({", ".join(t[1])})'),
            st.tuples(inner, st.sampled_from(['0', '1', '2', '3', '-1', 'x', '0:1'])).map(
                lambda t: f'{t[0]}[{t[1]}]'),
            st.tuples(inner, st.sampled_from(['real', '__class__', 'T'])).map(
                lambda t: f'{t[0]}.{t[1]}'),
            inner.map(lambda e: f'(lambda: {e})'),
            st.tuples(inner, inner, inner).map(lambda t: f'({t[0]} if {t[1]} else {t[2]})'),
            st.lists(inner, min_size=2, max_size=3).map(lambda xs: f'[{", ".join(xs)}]'),
            inner.map(lambda e: f'position({e})'),
        )
    return st.recursive(LEAVES, extend, max_leaves=25)


@FUZZ
@given(_expressions())
def test_grammar_expressions_raise_only_formula_errors(text: str) -> None:
    """Random expressions from a grammar that mixes allowed and forbidden constructs."""
    compile_only_formula_errors(text)


HOSTILE = [
    "__import__('os').system('touch {marker}')",
    "open('{marker}', 'w')",
    "fuzz_sentinel()",
    "().__class__.__bases__[0].__subclasses__()",
    "(lambda: fuzz_sentinel())()",
    "[fuzz_sentinel() for _ in (1,)]",
    "eval('fuzz_sentinel()')",
    "exec('fuzz_sentinel()')",
    "getattr(sin, '__globals__')",
    "sin.__globals__['__builtins__']",
    "f'{{fuzz_sentinel()}}'",
    "(y := fuzz_sentinel())",
    "position(fuzz_sentinel())",
    "value_now(fuzz_sentinel())",
    "sin(*fuzz_sentinel())",
    "sin(**{{'x': 1}})",
    "x if fuzz_sentinel() else x",
    "a.__class__.__init__.__globals__",
]
#: plain names pass the syntax check (it resolves no names) but must not resolve
HOSTILE_NAMES = ['__builtins__', '__import__', 'fuzz_sentinel', 'open', 'eval']


@pytest.fixture
def sentinel() -> Iterator[list[int]]:
    """A builtin that would be reachable by any eval/exec of the text; records calls."""
    calls: list[int] = []
    builtins.fuzz_sentinel = lambda *args: calls.append(1)  # type: ignore[attr-defined]
    yield calls
    del builtins.fuzz_sentinel  # type: ignore[attr-defined]


@pytest.mark.parametrize('template', HOSTILE)
def test_code_execution_attempts_are_rejected_without_side_effects(
        template: str, sentinel: list[int], tmp_path: Path) -> None:
    """Known escape tricks: FormulaError, the sentinel is never called, no file appears."""
    marker = tmp_path / 'executed'
    text = template.format(marker=marker)
    with pytest.raises(FormulaError):
        check_formula_syntax(text)
    with pytest.raises(FormulaError):
        compile_formula(text, SCOPE)
    assert sentinel == []
    assert not marker.exists()


@pytest.mark.parametrize('name', HOSTILE_NAMES)
def test_python_names_do_not_resolve(name: str, sentinel: list[int]) -> None:
    """Names come only from the scope and the constants, never from Python's namespaces."""
    with pytest.raises(FormulaError, match=f"unknown name '{name}'"):
        compile_formula(name, SCOPE)
    assert sentinel == []
