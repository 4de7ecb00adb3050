"""The skills a controller can switch between: loaded and compiled off the control thread.

A reload looks at every ``*.yaml`` file of the skills folder, loads and compiles the new or
changed ones (by content digest) and keeps the previous version of any file that fails, so a bad
edit never takes a working skill away. All skills must drive the controller's robot (same joint
names), because the command is published in one fixed joint order. A skill without ``robot:``
compiles against the controller's own model (``model``: from its URDF file or the
robot_description topic); a link or joint it names that the model lacks fails the file at the
formula's line, like any unknown name.

A skill's name becomes the prefix of its parameters (``<skill>.<tunable>``) and of its
activation service, so names the node uses itself (``reserved``: its parameters and parameter
groups such as ``watchdog`` or ``inputs``) are refused at load, located at the file's ``skill``
field; so is ``hold`` (HOLD), the name of the control loop's built-in hold, whatever the
node. A skill listed in ``keep`` (the running one) whose file disappeared stays loaded until a
later reload, so the running skill and its parameters never vanish under the controller.
"""
from __future__ import annotations

import hashlib
import threading
from collections.abc import Callable, Collection
from dataclasses import dataclass, field
from pathlib import Path

from ..errors import ConstraintCtrlError
from ..model.kinematics import RobotModel
from ..skill.compile import CompiledSkill, compile_skill
from ..skill.loader import load_skill
from ..skill.robot import robot_model
from .runner import SkillRunner

#: The control loop's built-in hold (runtime/loop.py): zero velocity with the watchdog active.
#: Not a skill file: `activate_skill` and the ~/hold service accept it, so no skill may be
#: named so.
HOLD = 'hold'


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
    kept: dict[str, str] = field(default_factory=dict)     # skill -> why it stays loaded
    notes: list[str] = field(default_factory=list)         # what the node did about it

    @property
    def ok(self) -> bool:
        return not self.failed

    def _loaded_parts(self) -> list[str]:
        return [f'{label}: {", ".join(sorted(names))}' for label, names in
                (('added', self.added), ('changed', self.changed), ('removed', self.removed),
                 ('unchanged', self.unchanged)) if names] + \
            [f'kept {name}: {why}' for name, why in sorted(self.kept.items())]

    def summary(self) -> str:
        """One line (the ~/reload_skills reply): loaded names, then each failed file."""
        parts = self._loaded_parts()
        for path, message in sorted(self.failed.items()):
            parts.append(f'FAILED {path}: {message}')
        parts.extend(self.notes)
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
        return lines + list(self.notes)


class SkillLibrary:
    """Skills by name. ``reload`` may run on any thread; lookups are cheap and thread-safe."""

    def __init__(self, folder: Path, joint_names: tuple[str, ...],
                 qp_solver: str = 'quadprog', reserved: Collection[str] = (),
                 model: RobotModel | None = None) -> None:
        """``qp_solver``: 'quadprog' (default) or 'daqp', the QP solver of every skill;
        ``reserved``: names a skill may not have (see the module docstring); ``model``: the
        controller's robot, for skills without ``robot:`` (None: such skills are refused)."""
        self.folder = Path(folder)
        self.joint_names = tuple(joint_names)
        self.qp_solver = qp_solver
        self.reserved = frozenset(reserved)
        self._skills: dict[str, LoadedSkill] = {}
        self._by_path: dict[Path, str] = {}
        self._lock = threading.Lock()
        self.model = model
        self._models: dict[tuple[Path | None, str | None], RobotModel] = {}

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
        if spec.name == HOLD:
            raise spec.error(f'skill name {HOLD!r} is the controller\'s built-in hold (zero '
                             'velocity, watchdog active; ~/hold, activate_skill hold); rename '
                             'the skill', 'skill')
        if spec.name in self.reserved:
            raise spec.error(f'skill name {spec.name!r} is used by the controller itself (its '
                             f'parameters or parameter groups: '
                             f'{", ".join(sorted(self.reserved))}); rename the skill',
                             'skill')
        key = (None if spec.robot is None else spec.robot.resolve(), spec.base_link)
        model = self._models.get(key)
        if model is None:
            # URDF and base_link errors located in the file
            model = robot_model(spec, self.model)
            self._models[key] = model
        if set(model.joint_names) != set(self.joint_names):
            robot = 'the controller\'s robot' if spec.robot is None else \
                f'robot {spec.robot.name}'
            raise spec.error(f'{robot} has joints {list(model.joint_names)}, but this '
                             f'controller drives {list(self.joint_names)}',
                             'skill' if spec.robot is None else 'robot')
        compiled = compile_skill(spec, model)
        return LoadedSkill(path=path, digest=hashlib.sha256(data).hexdigest(),
                           compiled=compiled, runner=SkillRunner(compiled, self.qp_solver))

    def reload(self, prepare: Callable[[LoadedSkill, LoadedSkill | None], None] | None = None,
               keep: Collection[str] = ()) -> ReloadReport:
        """Load new and changed files; drop skills whose file is gone (except those in
        ``keep``). ``prepare(new, old)`` runs on each new or changed skill before it becomes
        visible to ``get`` (old is the version it replaces, or None), e.g. to give it the
        values set at run time; an exception there fails that file like a load error.
        """
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
            if prepare is not None:
                try:
                    prepare(loaded, other)
                except ConstraintCtrlError as err:
                    report.failed[path.name] = str(err)
                    if old is not None:
                        seen.add(old.name)
                    continue
            staged[loaded.name] = loaded
            seen.add(loaded.name)
            # a new version of a skill by the same name is a change; a new name is an addition
            (report.changed if loaded.name in self._skills else report.added).append(loaded.name)
        with self._lock:
            for name, loaded in staged.items():
                self._skills[name] = loaded
                self._by_path[loaded.path] = name
            # gone: files removed, and the old name of a file whose skill was renamed
            for name in list(self._skills):
                if name in seen:
                    continue
                if name in keep:
                    report.kept[name] = ('its file is gone (or names another skill now) but it '
                                         'is running; it stays until another skill is active '
                                         'and the folder is reloaded')
                    continue
                report.removed.append(name)
                path = self._skills[name].path
                if self._by_path.get(path) == name:
                    del self._by_path[path]
                del self._skills[name]
        return report


__all__ = ['HOLD', 'LoadedSkill', 'ReloadReport', 'SkillLibrary']
