"""Packaging: parameter files, package.xml, LICENSE and setup.py as ROS 2 tools read them.

Outside references, named per check:
* [XSD] ros-infrastructure/rep xsd/package_format3.xsd and package_common.xsd (REP 149, the
  schema package.xml's xml-model line names): element order, required elements, name, version
  and e-mail patterns, the license `file` attribute.
* [PARAMS] docs.ros.org "Migrating YAML parameter files" / rcl_yaml_param_parser: `/**` as the
  node key means any node in any namespace; ros2/rclpy src/rclpy/node.cpp (humble, jazzy)
  `_populate_node_parameters_from_rcl_params` turns '/**' into `(/\\w+)*` and matches it against
  the node's fully qualified name.
* [ROSDEP] ros/rosdistro rosdep/python.yaml (snapshot of 2026-08): the system keys of the PyPI
  dependencies that have one; the others are installed with pip (README).
* [DISTRO] ros/rosdistro humble/ and jazzy/distribution.yaml, ros2/geometry2
  tf2_ros_py/package.xml: the Python module `tf2_ros` is the ROS package `tf2_ros_py`.
* [METADATA] importlib.metadata.packages_distributions(): which installed distribution provides
  an imported top-level module (a module no distribution provides here is a ROS package).
* [APACHE] Debian's /usr/share/common-licenses/Apache-2.0 (the licence text as published by the
  ASF), where present.
"""
from __future__ import annotations

import ast
import importlib.metadata
import importlib.util
import re
import sys
import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Any

import pytest
import yaml

from constraint_ctrl.transport.ros_args import overrides_for, parse_ros_args

ROOT = Path(__file__).resolve().parents[2]
PACKAGE = 'constraint_ctrl'

#: [DISTRO] imported module -> ROS package providing it, where the names differ.
ROS_PACKAGE_OF_MODULE = {'tf2_ros': 'tf2_ros_py'}
#: [ROSDEP] PyPI distribution (normalised name) -> rosdep system key.
SYSTEM_KEYS = {'numpy': 'python3-numpy', 'scipy': 'python3-scipy', 'pyyaml': 'python3-yaml',
               'matplotlib': 'python3-matplotlib', 'tqdm': 'python3-tqdm',
               'ruamel-yaml': 'python3-ruamel.yaml', 'pytest': 'python3-pytest',
               'hypothesis': 'python3-hypothesis'}
#: Declared for setup.py itself, as ROS 2's ament_python package template does; not a run
#: dependency of the code.
BUILD_ONLY = {'setuptools'}
DEPEND_TAGS = ('build_depend', 'build_export_depend', 'buildtool_depend',
               'buildtool_export_depend', 'exec_depend', 'depend', 'doc_depend', 'test_depend',
               'conflict', 'replace')
#: [XSD] the package element's sequence; every dependency tag shares one place (an xs:choice).
XSD_ORDER = ['name', 'version', 'description', 'maintainer', 'license', 'url', 'author',
             'dependency', 'group_depend', 'member_of_group', 'export']


def _normalise(dist: str) -> str:
    """PEP 503 normalised distribution name."""
    return re.sub(r'[-_.]+', '-', dist).lower()


def _requirement_name(requirement: str) -> str:
    return _normalise(re.split(r'[<>=!~;\[ ]', requirement, maxsplit=1)[0])


# --- setup.py and package.xml as data ---------------------------------------------------------

def _setup_keywords() -> dict[str, Any]:
    tree = ast.parse((ROOT / 'setup.py').read_text())
    constants = {target.id: node.value.value for node in tree.body
                 if isinstance(node, ast.Assign) and isinstance(node.value, ast.Constant)
                 for target in node.targets if isinstance(target, ast.Name)}
    call = next(node for node in ast.walk(tree) if isinstance(node, ast.Call)
                and isinstance(node.func, ast.Name) and node.func.id == 'setup')
    found: dict[str, Any] = {}
    for kw in call.keywords:
        if isinstance(kw.value, ast.Name) and kw.value.id in constants:
            found[kw.arg] = constants[kw.value.id]
            continue
        try:
            found[kw.arg] = ast.literal_eval(kw.value)
        except ValueError:
            found[kw.arg] = ast.unparse(kw.value)
    return found


def _manifest() -> ET.Element:
    return ET.parse(ROOT / 'package.xml').getroot()


def _depends(tags: tuple[str, ...]) -> set[str]:
    root = _manifest()
    return {(el.text or '').strip() for tag in tags for el in root.findall(tag)}


def _imports(files: list[Path]) -> dict[str, list[str]]:
    """Absolute top-level imports (and pytest.importorskip names) -> files using them."""
    used: dict[str, list[str]] = {}
    for path in files:
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            names: list[str] = []
            if isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                names = [node.module]
            elif (isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute)
                  and node.func.attr == 'importorskip' and node.args
                  and isinstance(node.args[0], ast.Constant)):
                names = [str(node.args[0].value)]
            for name in names:
                used.setdefault(name.split('.')[0], []).append(str(path.relative_to(ROOT)))
    return used


def _third_party(files: list[Path]) -> dict[str, list[str]]:
    local = {p.stem for p in files} | {PACKAGE, '__future__'}
    return {name: where for name, where in _imports(files).items()
            if name not in sys.stdlib_module_names and name not in local}


def _code_files() -> list[Path]:
    return sorted((ROOT / PACKAGE).rglob('*.py')) + sorted((ROOT / 'launch').glob('*.py'))


def _test_files() -> list[Path]:
    return sorted((ROOT / 'test').rglob('*.py'))


def _distributions_of(module: str, providers: dict[str, list[str]]) -> set[str]:
    """Installed distributions providing a top-level module [METADATA]. Wheels that install
    below a prefix of their own and add it with a .pth file (PyPI `pin` puts `pinocchio` under
    cmeel.prefix/) are found from the module's file instead."""
    if module in providers:
        return {_normalise(d) for d in providers[module]}
    spec = importlib.util.find_spec(module)
    if spec is None or spec.origin is None:
        return set()
    origin = Path(spec.origin).resolve()
    for dist in importlib.metadata.distributions():
        for file in dist.files or ():
            if file.name == origin.name and Path(dist.locate_file(file)).resolve() == origin:
                return {_normalise(dist.metadata['Name'])}
    return set()


def _check_split(used: dict[str, list[str]], pypi_declared: set[str],
                 ros_declared: set[str]) -> list[str]:
    """Problems: a PyPI import not declared for pip, a ROS import not in package.xml."""
    providers = importlib.metadata.packages_distributions()      # [METADATA]
    problems = []
    for module, where in sorted(used.items()):
        dists = _distributions_of(module, providers)
        if dists:
            if not dists & pypi_declared:
                problems.append(f'{module} (PyPI {sorted(dists)}, used in {where[0]}) is not '
                                'in setup.py')
        elif ROS_PACKAGE_OF_MODULE.get(module, module) not in ros_declared:
            problems.append(f'{module} (ROS package {ROS_PACKAGE_OF_MODULE.get(module, module)}'
                            f', used in {where[0]}) is not in package.xml')
    return problems


# --- parameter files [PARAMS] -----------------------------------------------------------------

def _parameter_files() -> list[Path]:
    found = []
    for path in sorted([*ROOT.glob('config/**/*.yaml'), *ROOT.glob('launch/**/*.yaml')]):
        doc = yaml.safe_load(path.read_text())
        if isinstance(doc, dict) and 'ros__parameters' in path.read_text():
            found.append(path)
    return found


def test_there_is_a_parameter_file() -> None:
    assert ROOT / 'config' / 'controller.yaml' in _parameter_files()


@pytest.mark.parametrize('path', _parameter_files(), ids=lambda p: str(p.relative_to(ROOT)))
def test_parameter_files_use_the_wildcard_node_key(path: Path) -> None:
    """`/**:` so that the file follows the node wherever it is renamed or namespaced."""
    doc = yaml.safe_load(path.read_text())
    assert list(doc) == ['/**'], f'{path.name}: top-level keys {list(doc)}, expected ["/**"]'
    assert 'ros__parameters' in doc['/**']


@pytest.mark.parametrize('fqn', ['/constraint_controller', '/cell_a/constraint_controller',
                                 '/line_2/cell_a/arm_controller'])
def test_controller_parameters_reach_any_node_name_and_namespace(fqn: str) -> None:
    """What `ros2 launch ... namespace:=cell_a` or `-r __node:=...` does to the node's name;
    the parameters must still apply (same parser the DDS transport uses)."""
    params = ROOT / 'config' / 'controller.yaml'
    args = parse_ros_args(['--ros-args', '--params-file', str(params)])
    applied = overrides_for(args, fqn)
    expected = yaml.safe_load(params.read_text())['/**']['ros__parameters']
    assert applied['rate_hz'] == expected['rate_hz']
    assert applied['watchdog.reduced_speed'] == expected['watchdog']['reduced_speed']
    assert applied['people.sources'] == expected['people']['sources']


def test_a_later_command_line_value_overrides_the_file() -> None:
    """With the file under '/**' a later `-p` lands in the same entry and wins, on rclpy as on
    the DDS transport [PARAMS: rcl stores -p under '/**'; later values overwrite]; the demo
    relies on it for status_rate_hz and watchdog.reduced_speed."""
    params = ROOT / 'config' / 'controller.yaml'
    args = parse_ros_args(['--ros-args', '--params-file', str(params), '-p',
                           'status_rate_hz:=50.0'])
    assert overrides_for(args, '/cell_a/constraint_controller')['status_rate_hz'] == 50.0


# --- package.xml against the format 3 schema [XSD] --------------------------------------------

def _schema_problems(root: ET.Element) -> list[str]:
    """What [XSD] refuses in a package.xml root, as far as these rules go (xmllint with the
    schema agreed on this file, by hand)."""
    problems = []
    if root.tag != 'package' or root.get('format') != '3':
        problems.append('root must be <package format="3">')
    tags = [child.tag for child in root if isinstance(child.tag, str)]
    unknown = [t for t in tags if t not in XSD_ORDER and t not in DEPEND_TAGS]
    if unknown:
        problems.append(f'elements the schema does not know: {unknown}')
    ranks = [XSD_ORDER.index('dependency' if t in DEPEND_TAGS else t) for t in tags
             if t not in unknown]
    if ranks != sorted(ranks):
        problems.append(f'elements out of the schema order: {tags}')
    for tag in ('name', 'version', 'description'):
        if tags.count(tag) != 1:
            problems.append(f'<{tag}> must appear exactly once')
    if not tags.count('maintainer') or not tags.count('license'):
        problems.append('at least one <maintainer> and one <license> are required')
    if tags.count('export') > 1:
        problems.append('at most one <export>')
    if not re.fullmatch(r'[a-z](_?[a-z0-9]+)*', root.findtext('name', '')):
        problems.append(f'package name {root.findtext("name")!r}')
    if not re.fullmatch(r'(0|[1-9][0-9]*)(\.(0|[1-9][0-9]*)){2}', root.findtext('version', '')):
        problems.append(f'version {root.findtext("version")!r}')
    email = (r'[-a-zA-Z0-9_%+]+(\.[-a-zA-Z0-9_%+]+)*@[-a-zA-Z0-9%]+(\.[-a-zA-Z0-9%]+)*'
             r'\.[a-zA-Z]{2,}')
    for maintainer in root.findall('maintainer'):
        if not re.fullmatch(email, maintainer.get('email', '')):
            problems.append(f'maintainer e-mail {maintainer.get("email")!r}')
    return problems


def test_manifest_follows_the_format_3_schema() -> None:
    root = _manifest()
    assert _schema_problems(root) == []
    for license_el in root.findall('license'):
        if license_el.get('file'):
            assert (ROOT / license_el.get('file')).is_file(), license_el.attrib
    assert root.findtext('export/build_type') == 'ament_python'


@pytest.mark.parametrize(('edit', 'problem'), [
    (('<name>constraint_ctrl</name>', '<name>Bad__name</name>'), 'package name'),
    (('<license file="LICENSE">', '<url>https://example.com</url><license file="LICENSE">'),
     'out of the schema order'),
    (('<version>0.1.0</version>', '<version>0.1</version>'), 'version'),
    (('<export>', '<test_depend>x</test_depend><export>'), ''),
    (('email="dev@example.com"', 'email="dev"'), 'e-mail'),
])
def test_schema_rules_refuse_what_xmllint_refuses(edit: tuple[str, str], problem: str) -> None:
    """The rules above fail on manifests xmllint --schema package_format3.xsd refuses (and
    pass the one it accepts: a dependency just before <export>)."""
    text = (ROOT / 'package.xml').read_text()
    assert edit[0] in text
    found = _schema_problems(ET.fromstring(text.replace(edit[0], edit[1]).split('?>', 2)[2]))
    if problem:
        assert any(problem in p for p in found), found
    else:
        assert found == []


def test_manifest_lists_no_dependency_twice() -> None:
    """A name twice under one tag, or under `depend` and one of the tags it stands for, is a
    duplicate catkin_pkg refuses (from memory); exec_depend plus test_depend is allowed."""
    root = _manifest()
    for tag in DEPEND_TAGS:
        names = [(el.text or '').strip() for el in root.findall(tag)]
        assert len(names) == len(set(names)), f'<{tag}> repeats {names}'
    both = _depends(('depend',)) & _depends(('build_depend', 'build_export_depend',
                                             'exec_depend'))
    assert not both, f'in <depend> and in a tag it implies: {both}'


def test_manifest_and_setup_agree_on_name_version_and_licence() -> None:
    root = _manifest()
    setup = _setup_keywords()
    assert root.findtext('name') == setup['name'] == PACKAGE
    assert root.findtext('version') == setup['version']
    assert [el.text for el in root.findall('license')] == [setup['license']] == ['Apache-2.0']


# --- dependencies [METADATA] [ROSDEP] [DISTRO] ------------------------------------------------

def test_every_import_of_the_code_is_a_declared_run_dependency() -> None:
    setup = _setup_keywords()
    pypi = {_requirement_name(r) for r in setup['install_requires']}
    problems = _check_split(_third_party(_code_files()), pypi,
                            _depends(('exec_depend', 'depend')))
    assert not problems, '\n'.join(problems)


def test_every_import_of_the_tests_is_a_declared_test_dependency() -> None:
    setup = _setup_keywords()
    pypi = {_requirement_name(r) for r in
            [*setup['install_requires'], *setup['extras_require']['test']]}
    problems = _check_split(_third_party(_test_files()), pypi,
                            _depends(('exec_depend', 'depend', 'test_depend')))
    assert not problems, '\n'.join(problems)


def test_every_ros_run_dependency_is_used() -> None:
    """No stale entries: each ROS package in exec_depend is imported by the code."""
    used = {ROS_PACKAGE_OF_MODULE.get(m, m) for m in _third_party(_code_files())}
    ros_deps = {d for d in _depends(('exec_depend', 'depend')) if not d.startswith('python3-')}
    assert ros_deps - used == set()


def _readme_pip_installs() -> set[str]:
    text = ' '.join((ROOT / 'README.md').read_text().split())
    names: set[str] = set()
    for span in re.findall(r'`pip install ([^`]+)`', text):
        names |= {_normalise(word) for word in span.split() if not word.startswith('-')}
    return names


@pytest.mark.parametrize(('extra', 'tag'), [(None, 'exec_depend'), ('test', 'test_depend')])
def test_pypi_dependencies_have_a_rosdep_key_or_a_pip_line(extra: str | None, tag: str) -> None:
    """A PyPI dependency with a rosdep system key is in package.xml under that key; one
    without is named in a README `pip install` line for ROS users [ROSDEP]."""
    setup = _setup_keywords()
    requirements = setup['install_requires'] if extra is None else setup['extras_require'][extra]
    declared = _depends((tag, 'depend'))
    pip_lines = _readme_pip_installs()
    problems = []
    for name in sorted({_requirement_name(r) for r in requirements} - BUILD_ONLY):
        key = SYSTEM_KEYS.get(name)
        if key is not None and key not in declared:
            problems.append(f'{name}: rosdep key {key} missing from <{tag}>')
        if key is None and name not in pip_lines:
            problems.append(f'{name}: no rosdep key, and no README `pip install` line names it')
    assert not problems, '\n'.join(problems)


# --- LICENSE and setup.py ---------------------------------------------------------------------

def test_license_file_holds_the_apache_2_0_text() -> None:
    text = (ROOT / 'LICENSE').read_text()
    words = text.split()
    assert words[:5] == ['Apache', 'License', 'Version', '2.0,', 'January'], words[:5]
    assert 'END OF TERMS AND CONDITIONS' in text
    reference = Path('/usr/share/common-licenses/Apache-2.0')       # [APACHE]
    if reference.is_file():
        assert words == reference.read_text().split()


def test_setup_has_no_deprecated_tests_require() -> None:
    """setuptools deprecated `tests_require` with the `test` command (removed in 72);
    test dependencies are the `test` extra."""
    setup = _setup_keywords()
    assert 'tests_require' not in setup
    assert 'test' in setup['extras_require']


def test_make_test_runs_the_linter_with_the_projects_rules() -> None:
    """`make test` (the README's and CI's test command) runs ruff first, with the rule set of
    pyproject.toml [tool.ruff] (ruff's documented configuration table), and ruff is among the
    test extras so a fresh clone's venv has it."""
    import tomllib
    config = tomllib.loads((ROOT / 'pyproject.toml').read_text())['tool']['ruff']
    assert {'E', 'F', 'W', 'B'} <= set(config['lint']['select'])
    makefile = (ROOT / 'Makefile').read_text()
    test_rule = re.search(r'^test:(.*)$', makefile, flags=re.M)
    lint_rule = re.search(r'^lint:.*\n\t(.*)$', makefile, flags=re.M)
    assert test_rule is not None and 'lint' in test_rule.group(1).split()
    assert lint_rule is not None and lint_rule.group(1).split()[0].endswith('ruff')
    extras = ast.literal_eval(re.search(r"'test': (\[.*?\])", (ROOT / 'setup.py').read_text(),
                                        flags=re.S).group(1))
    assert any(e.startswith('ruff') for e in extras)
