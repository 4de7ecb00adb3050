"""The skills a controller can switch between: loaded and compiled off the control thread.

A reload looks at every ``*.yaml`` file of the skills folder, loads and compiles the new or
changed ones (by content digest) and keeps the previous version of any file that fails, so a bad
edit never takes a working skill away. All skills must drive the controller's robot (same joint
names), because the command is published in one fixed joint order.
"""
from __future__ import annotations

import hashlib
import threading
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import ConstraintCtrlError
from ..model.kinematics import RobotModel
from ..skill.compile import CompiledSkill, compile_skill
from ..skill.loader import load_skill
from ..skill.robot import robot_model
from .runner import SkillRunner


@dataclass(slots=True)
class LoadedSkill:
    path: Path
    digest: str
    compiled: CompiledSkill
    runner: SkillRunner

    @property
    def name(self) -> str:
        return self.compiled.spec.name


@dataclass(slots=True)
class ReloadReport:
    added: list[str] = field(default_factory=list)
    changed: list[str] = field(default_factory=list)
    unchanged: list[str] = field(default_factory=list)
    removed: list[str] = field(default_factory=list)
    failed: dict[str, str] = field(default_factory=dict)   # file name -> error message

    @property
    def ok(self) -> bool:
        return not self.failed

    def _loaded_parts(self) -> list[str]:
        return [f'{label}: {", ".join(sorted(names))}' for label, names in
                (('added', self.added), ('changed', self.changed), ('removed', self.removed),
                 ('unchanged', self.unchanged)) if names]

    def summary(self) -> str:
        """One line (the ~/reload_skills reply): loaded names, then each failed file."""
        parts = self._loaded_parts()
        for path, message in sorted(self.failed.items()):
            parts.append(f'FAILED {path}: {message}')
        return '; '.join(parts) if parts else 'no skill files found'

    def log_lines(self) -> list[str]:
        """The same for a log: loaded names first, then one line per failed file (its error).

        One line per file, so a reader (or grep) sees every failure on its own.
        """
        head = '; '.join(self._loaded_parts())
        if self.failed:
            head = (head + '; ' if head else '') + f'{len(self.failed)} file(s) failed to load:'
        lines = [head or 'no skill files found']
        lines += [f'FAILED {path}: {" ".join(message.split())}'
                  for path, message in sorted(self.failed.items())]
        return lines


class SkillLibrary:
    """Skills by name. ``reload`` may run on any thread; lookups are cheap and thread-safe."""

    def __init__(self, folder: Path, joint_names: tuple[str, ...],
                 qp_solver: str = 'quadprog') -> None:
        """``qp_solver``: 'quadprog' (default) or 'daqp', the QP solver of every skill."""
        self.folder = Path(folder)
        self.joint_names = tuple(joint_names)
        self.qp_solver = qp_solver
        self._skills: dict[str, LoadedSkill] = {}
        self._by_path: dict[Path, str] = {}
        self._lock = threading.Lock()
        self._models: dict[tuple[Path, str | None], RobotModel] = {}

    def names(self) -> list[str]:
        with self._lock:
            return sorted(self._skills)

    def get(self, name: str) -> LoadedSkill | None:
        with self._lock:
            return self._skills.get(name)

    def load_file(self, path: Path) -> LoadedSkill:
        """Load and compile one file; raises ConstraintCtrlError with the file's location."""
        data = path.read_bytes()
        spec = load_skill(path)
        key = (spec.robot.resolve(), spec.base_link)
        model = self._models.get(key)
        if model is None:
            model = robot_model(spec)   # URDF and base_link errors located in the file
            self._models[key] = model
        if set(model.joint_names) != set(self.joint_names):
            msg = (f'{path}: robot {spec.robot.name} has joints {list(model.joint_names)}, '
                   f'but this controller drives {list(self.joint_names)}')
            raise ConstraintCtrlError(msg)
        compiled = compile_skill(spec, model)
        return LoadedSkill(path=path, digest=hashlib.sha256(data).hexdigest(),
                           compiled=compiled, runner=SkillRunner(compiled, self.qp_solver))

    def reload(self) -> ReloadReport:
        report = ReloadReport()
        files = sorted(self.folder.glob('*.yaml')) if self.folder.is_dir() else []
        if not self.folder.is_dir():
            report.failed[str(self.folder)] = 'skills folder does not exist'
            return report
        seen: set[str] = set()
        staged: dict[str, LoadedSkill] = {}
        for path in files:
            path = path.resolve()
            try:
                digest = hashlib.sha256(path.read_bytes()).hexdigest()
            except OSError as err:
                report.failed[path.name] = str(err)
                continue
            old_name = self._by_path.get(path)
            old = self._skills.get(old_name) if old_name else None
            if old is not None and old.digest == digest:
                report.unchanged.append(old.name)
                seen.add(old.name)
                continue
            try:
                loaded = self.load_file(path)
            except ConstraintCtrlError as err:
                report.failed[path.name] = str(err)
                if old is not None:
                    seen.add(old.name)   # keep the working version
                continue
            other = self._skills.get(loaded.name)
            if (other is not None and other.path != path) or loaded.name in staged:
                report.failed[path.name] = (f'skill name {loaded.name!r} is already used by '
                                            f'{(other or staged[loaded.name]).path.name}')
                if old is not None:
                    seen.add(old.name)
                continue
            staged[loaded.name] = loaded
            seen.add(loaded.name)
            (report.changed if old is not None or loaded.name in self._skills
             else report.added).append(loaded.name)
        with self._lock:
            for name, loaded in staged.items():
                old_name = self._by_path.get(loaded.path)
                if old_name and old_name != name:
                    self._skills.pop(old_name, None)
                self._skills[name] = loaded
                self._by_path[loaded.path] = name
            for name in list(self._skills):
                if name not in seen:
                    report.removed.append(name)
                    self._by_path.pop(self._skills[name].path, None)
                    del self._skills[name]
        return report


__all__ = ['LoadedSkill', 'ReloadReport', 'SkillLibrary']
