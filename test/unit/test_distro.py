"""On a ROS install the message layouts follow the installed ROS, not a flag.

No ROS here, so a fake ROS install stands in: a `rclpy` package and a `sensor_msgs.msg.Range`
class with the classmethod every generated rclpy message class has,
`get_fields_and_field_types()` (rosidl_generator_py's message template). Its fields are taken
from rosbags' type stores (the outside reference): sensor_msgs/Range has `variance` in the
ROS2_JAZZY store and not in ROS2_HUMBLE, the one layout difference among the messages the
nodes use.
"""
from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from rosbags.typesys import Stores, get_typestore

from constraint_ctrl.errors import TransportError
from constraint_ctrl.nodes.common import transport_options
from constraint_ctrl.transport.port import choose_distro, detect_distro, open_port

FAKE_MODULES = ('rclpy', 'sensor_msgs', 'sensor_msgs.msg')


def _range_fields(store: Stores) -> dict[str, str]:
    cls = get_typestore(store).types['sensor_msgs/msg/Range']
    return {name: 'double' for name, field in cls.__dataclass_fields__.items()
            if not name.isupper() and not name.startswith('__')}


@pytest.fixture
def fake_ros(tmp_path: Path, monkeypatch: pytest.MonkeyPatch
             ) -> Iterator[Callable[[str | None, Stores], None]]:
    """fake_ros(ROS_DISTRO or None, store whose Range layout the install has)."""

    def install(ros_distro: str | None, store: Stores) -> None:
        (tmp_path / 'rclpy').mkdir()
        (tmp_path / 'rclpy' / '__init__.py').write_text('')
        msg = tmp_path / 'sensor_msgs' / 'msg'
        msg.mkdir(parents=True)
        (tmp_path / 'sensor_msgs' / '__init__.py').write_text('')
        (msg / '__init__.py').write_text(
            'class Range:\n'
            f'    _fields_and_field_types = {_range_fields(store)!r}\n\n'
            '    @classmethod\n'
            '    def get_fields_and_field_types(cls):\n'
            '        return dict(cls._fields_and_field_types)\n')
        monkeypatch.syspath_prepend(str(tmp_path))
        importlib.invalidate_caches()
        if ros_distro is None:
            monkeypatch.delenv('ROS_DISTRO', raising=False)
        else:
            monkeypatch.setenv('ROS_DISTRO', ros_distro)

    for name in FAKE_MODULES:
        assert name not in sys.modules, f'a real {name} is loaded; this test needs none'
    yield install
    for name in FAKE_MODULES:
        sys.modules.pop(name, None)


def test_humble_install_is_detected(fake_ros) -> None:
    fake_ros('humble', Stores.ROS2_HUMBLE)
    distro, evidence = detect_distro()
    assert distro == 'humble'
    assert 'ROS_DISTRO=humble' in evidence and 'variance' in evidence
    assert choose_distro('rclpy', 'auto') == 'humble'
    assert choose_distro('rclpy', 'humble') == 'humble'


def test_contradicting_distro_is_refused_on_rclpy(fake_ros) -> None:
    """The issue's case: Humble's rclpy with the jazzy layouts crashed the simulator."""
    fake_ros('humble', Stores.ROS2_HUMBLE)
    for transport in ('rclpy', 'auto'):           # auto picks rclpy when it is importable
        with pytest.raises(TransportError) as err:
            open_port(transport, 'x', [], distro='jazzy')
        text = str(err.value)
        assert '--distro jazzy' in text and 'humble' in text and 'leave --distro out' in text


def test_jazzy_install_refuses_humble(fake_ros) -> None:
    fake_ros('jazzy', Stores.ROS2_JAZZY)
    assert detect_distro()[0] == 'jazzy'
    with pytest.raises(TransportError, match='--distro humble'):
        choose_distro('rclpy', 'humble')


def test_without_ros_distro_the_message_layout_decides(fake_ros) -> None:
    fake_ros(None, Stores.ROS2_HUMBLE)
    distro, evidence = detect_distro()
    assert distro == 'humble' and 'ROS_DISTRO' in evidence


def test_other_distro_uses_its_message_layout(fake_ros) -> None:
    """A distro newer than Jazzy with Jazzy's Range layout runs with the jazzy layouts."""
    fake_ros('kilted', Stores.ROS2_KILTED)
    distro, evidence = detect_distro()
    assert distro == 'jazzy' and 'kilted' in evidence


def test_ros_distro_and_installed_messages_disagree(fake_ros) -> None:
    """A mixed environment (ROS_DISTRO of one install, messages of another) is named."""
    fake_ros('jazzy', Stores.ROS2_HUMBLE)
    with pytest.raises(TransportError, match='ROS_DISTRO=jazzy.*no `variance`'):
        detect_distro()


def test_dds_transport_defaults_to_jazzy() -> None:
    assert choose_distro('dds', 'auto') == 'jazzy'
    assert choose_distro('dds', 'humble') == 'humble'
    with pytest.raises(TransportError, match="distro 'iron'"):
        choose_distro('dds', 'iron')


def test_distro_option_defaults_to_auto() -> None:
    parser = argparse.ArgumentParser()
    transport_options(parser)
    assert parser.parse_args([]).distro == 'auto'
    assert parser.parse_args(['--distro', 'humble']).distro == 'humble'
