"""ament_python package definition; also a plain pip-installable package."""
from glob import glob
import os

from setuptools import find_packages, setup

PACKAGE = 'constraint_ctrl'

setup(
    name=PACKAGE,
    version='0.1.0',
    description=('Runtime constraint-based robot control: task functions, a QP per tick, '
                 'a watchdog.'),
    packages=find_packages(include=[PACKAGE, PACKAGE + '.*']),
    data_files=[
        ('share/ament_index/resource_index/packages', ['resource/' + PACKAGE]),
        ('share/' + PACKAGE, ['package.xml']),
        (os.path.join('share', PACKAGE, 'launch'), glob('launch/*.launch.py')),
        (os.path.join('share', PACKAGE, 'config'), glob('config/*.yaml')),
        (os.path.join('share', PACKAGE, 'config', 'robots'), glob('config/robots/*.urdf')),
        (os.path.join('share', PACKAGE, 'config', 'skills'), glob('config/skills/*.yaml')),
        (os.path.join('share', PACKAGE, 'config', 'scenes'), glob('config/scenes/*.yaml')),
        (os.path.join('share', PACKAGE, 'config', 'plans'), glob('config/plans/*.yaml')),
        (os.path.join('share', PACKAGE, 'config', 'cookbook'), glob('config/cookbook/*.yaml')),
        (os.path.join('share', PACKAGE, 'config', 'cookbook', 'scenes'),
         glob('config/cookbook/scenes/*.yaml')),
    ],
    python_requires='>=3.10',
    install_requires=[
        'setuptools',
        'numpy>=1.24',
        'scipy>=1.10',
        'casadi>=3.6',
        'quadprog>=0.1.11',
        'daqp>=0.11',
        'pyyaml>=6',
        'cyclonedds>=0.10.5',
        'rosbags>=0.10',
        'ruamel.yaml>=0.17',   # bag.py writes metadata.yaml as rosbags does
        'matplotlib>=3.7',
        'tqdm>=4.60',
    ],
    extras_require={
        'test': ['pytest>=7.3', 'hypothesis>=6', 'pin>=2.7', 'osqp>=0.6', 'pytransform3d>=3',
                 'ruff>=0.6'],
    },
    zip_safe=False,
    maintainer='constraint_ctrl developers',
    maintainer_email='dev@example.com',
    license='Apache-2.0',
    entry_points={
        'console_scripts': [
            'constraint-ctrl = constraint_ctrl.cli:main',
            # Node executables for `ros2 run constraint_ctrl <name>` and launch files.
            'controller_node = constraint_ctrl.nodes.controller_node:main',
            'cell_simulator = constraint_ctrl.nodes.sim_node:main',
            'task_sequencer = constraint_ctrl.nodes.sequencer_node:main',
        ],
    },
)
