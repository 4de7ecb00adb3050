"""Where the controller's robot model comes from: a URDF file, or the robot_description topic.

On a ROS 2 cell robot_state_publisher holds the URDF in its parameter robot_description and
publishes it on the topic `robot_description` (std_msgs/String, reliable, keep last 1,
transient local), so a node that starts later still receives it. With
robot_description_source 'topic' the controller takes its model from there (our QoS profile
'robot_description' matches the publisher's); with 'file' (the default) from
robot_description_file, as before.

The wait uses the port's wait_for_message, a temporary subscription that needs no spin():
the model is needed before the node's subscriptions and skills exist. `load_robot_model` is
the one entry point, so a managed node can call it from its configure transition; a caller
that already receives the topic (a subscription that runs while the node spins) passes
``receive`` instead.
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ..errors import ConstraintCtrlError, ModelError
from ..model.kinematics import RobotModel

SOURCES = ('file', 'topic')
#: Names of the parameters read here (all read at start-up).
PARAMETERS = ('robot_description_source', 'robot_description_file', 'robot_description_topic',
              'robot_description_timeout')
#: s to wait for the latched description (robot_state_publisher may start a little later).
DEFAULT_TIMEOUT = 10.0


@dataclass(frozen=True, slots=True)
class ModelSource:
    source: str          # 'file' or 'topic'
    file: str            # URDF file (source 'file')
    topic: str           # topic (source 'topic'; relative names resolve in the node's namespace)
    timeout_s: float     # wait for the topic's description at most this long


@dataclass(frozen=True, slots=True)
class LoadedModel:
    model: RobotModel
    origin: str          # the file, or the resolved topic: for messages
    text: str | None     # the URDF text received (source 'topic'), for the bag


def declare_model_source(declare: Callable[..., Any], default_file: Path) -> ModelSource:
    """Declare the four parameters (read-only) and check them."""
    source = str(declare('robot_description_source', 'file', "'file' (robot_description_file) "
                         "or 'topic' (robot_description_topic, as robot_state_publisher "
                         'publishes it)', read_only=True).value)
    file = str(declare('robot_description_file', str(default_file), 'URDF file of the robot '
                       "(robot_description_source 'file')", read_only=True).value)
    topic = str(declare('robot_description_topic', 'robot_description', 'std_msgs/String topic '
                        "of the URDF (robot_description_source 'topic'), transient local",
                        read_only=True).value)
    timeout = declare('robot_description_timeout', DEFAULT_TIMEOUT, 's to wait for the robot '
                      'description on its topic at start', read_only=True).value
    if source not in SOURCES:
        msg = f"parameter robot_description_source must be 'file' or 'topic', got {source!r}"
        raise ConstraintCtrlError(msg)
    if isinstance(timeout, bool) or not isinstance(timeout, (int, float)) or not timeout > 0:
        msg = f'parameter robot_description_timeout must be a number of seconds > 0, got ' \
              f'{timeout!r}'
        raise ConstraintCtrlError(msg)
    return ModelSource(source, file, topic, float(timeout))


def load_robot_model(port: Any, source: ModelSource,
                     receive: Callable[[float], tuple[str | None, str]] | None = None
                     ) -> LoadedModel:
    """The model from the file, or from the topic's latched description.

    ``receive(timeout_s) -> (URDF text or None, topic name)`` replaces the port's
    wait_for_message (for a caller that subscribes itself). Raises ConstraintCtrlError naming
    the file or topic (a ModelError also names the URDF element).
    """
    if source.source == 'file':
        return LoadedModel(RobotModel.from_urdf(source.file), source.file, None)
    if receive is None:
        def receive(timeout_s: float) -> tuple[str | None, str]:
            msg, name = port.wait_for_message(port.types.String, source.topic,
                                              'robot_description', timeout_s)
            return (None if msg is None else str(msg.data)), name
    text, name = receive(source.timeout_s)
    if text is None:
        msg = (f'no robot description on {name} within {source.timeout_s:g} s (parameter '
               'robot_description_timeout); is robot_state_publisher running? It publishes '
               'std_msgs/String transient local, so starting it later is fine')
        raise ConstraintCtrlError(msg)
    try:
        model = RobotModel.from_urdf_string(text, source=name)
    except ModelError as err:        # "/robot_description: <joint name="j">: ..."
        raise ConstraintCtrlError(f'robot description on {name} cannot be used: {err}') \
            from None
    return LoadedModel(model, name, text)


def watch_robot_description(port: Any, source: ModelSource, loaded: LoadedModel) -> Any:
    """Source 'topic': keep listening, and say once when a different description arrives.

    robot_state_publisher publishes again when its robot_description parameter changes. The
    running node keeps its model (skills are compiled against it, the watchdog's points come
    from it); the new one is used at the next start. Returns the subscription (None for
    'file')."""
    if source.source != 'topic':
        return None
    said = []

    def on_description(msg: Any) -> None:
        if str(msg.data) != loaded.text and not said:
            said.append(True)
            port.log('warn', f'a new robot description arrived on {loaded.origin}; this node '
                     'keeps the model it started with: restart it to use the new one')
    return port.create_subscription(port.types.String, source.topic, on_description,
                                    'robot_description')


__all__ = ['DEFAULT_TIMEOUT', 'LoadedModel', 'ModelSource', 'PARAMETERS', 'SOURCES',
           'declare_model_source', 'load_robot_model', 'watch_robot_description']
