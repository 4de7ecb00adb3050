"""Tests and tools delete the temporary folders they create (issue 8 item 19).

Two rules, each checked so that it can fail: pytest deletes tmp_path folders of passing tests
(ini option tmp_path_retention_policy, pytest >= 7.3 documentation: 'all', 'failed', 'none'),
and every module that calls tempfile.mkdtemp also removes what it made (shutil.rmtree).
"""
from __future__ import annotations

import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]


def test_pytest_keeps_temporary_folders_only_of_failed_tests(
        pytestconfig: pytest.Config) -> None:
    assert pytestconfig.getini('tmp_path_retention_policy') == 'failed'


def test_every_mkdtemp_has_a_matching_removal() -> None:
    offenders = []
    checked = 0
    for path in [*ROOT.glob('constraint_ctrl/**/*.py'), *ROOT.glob('test/**/*.py')]:
        if path == Path(__file__):
            continue
        text = path.read_text()
        made = len(re.findall(r'\bmkdtemp\(', text))
        if not made:
            continue
        checked += 1
        if len(re.findall(r'\brmtree\(|\.cleanup\(|addCleanup\(shutil\.rmtree', text)) < made:
            offenders.append(str(path.relative_to(ROOT)))
    assert checked >= 2          # the bench's stats folder and the launch test's bag folder
    assert offenders == []
