"""The rclpy port's control path, against a stand-in rclpy (rclpy is not installable here).

What is checked is the mapping, not rclpy: entities created with control=True go to a second,
hidden node (`_<name>_control`, which `ros2 node list` hides because of the leading
underscore) whose names the main node resolved, that node is spun by its own executor on its
own thread (EventsExecutor where rclpy.experimental has it, else SingleThreadedExecutor), and
everything else stays on the main node's MultiThreadedExecutor. The stand-in classes take
exactly the parameters of rclpy 7.1.3 (Jazzy; rclpy/node.py, executors.py, utilities.py) and
of rclpy.experimental.EventsExecutor (rclpy 7.1.4+, experimental/events_executor.py: a
function taking only the keyword `context`), so a call with a parameter rclpy does not have
fails here as it would on a robot. The real thing is measured by hand on a ROS 2 core (README).
"""
from __future__ import annotations

import queue
import sys
import threading
import time
import types
from typing import Any
from collections.abc import Callable

import pytest

CONTEXT = object()


class _Messages(types.ModuleType):
    """A message package: any class name asked for exists (a plain class of that name)."""

    def __getattr__(self, name: str) -> type:
        if name.startswith('__'):
            raise AttributeError(name)
        cls = type(name, (), {'__module__': self.__name__})
        setattr(self, name, cls)
        return cls


class Entity:
    def __init__(self, kind: str, topic: str, callback: Callable[..., Any] | None,
                 kwargs: dict[str, Any]) -> None:
        self.kind, self.topic_name, self.callback, self.kwargs = kind, topic, callback, kwargs
        self.resets = 0

    def reset(self) -> None:        # rclpy Timer.reset()
        self.resets += 1


class RclpyParameter:
    """rclpy.parameter.Parameter(name, type_=None, value=None)."""

    def __init__(self, name: str, type_: Any = None, value: Any = None) -> None:
        self.name, self.type_, self.value = name, type_, value


class FakeParameter:
    def __init__(self, name: str, value: Any) -> None:
        self.name, self.value = name, value


class FakeLogger:
    def __init__(self, lines: list[str]) -> None:
        self.lines = lines

    def info(self, text: str) -> None:
        self.lines.append(text)

    debug = warning = error = info


class FakeNode:
    made: list[FakeNode] = []
    REMAPS = {'/cell/joint_states': '/robot/joint_states'}   # a process-wide `-r` rule

    def __init__(self, node_name: str, *, context: Any = None, cli_args: Any = None,
                 namespace: str | None = None, use_global_arguments: bool = True,
                 enable_rosout: bool = True, start_parameter_services: bool = True,
                 parameter_overrides: Any = None, allow_undeclared_parameters: bool = False,
                 automatically_declare_parameters_from_overrides: bool = False,
                 enable_logger_service: bool = False) -> None:
        self.name = node_name
        self.namespace = namespace or '/cell'
        self.context = context if context is not None else CONTEXT
        self.options = {'use_global_arguments': use_global_arguments,
                        'enable_rosout': enable_rosout,
                        'start_parameter_services': start_parameter_services}
        self.overrides = {p.name: p.value for p in parameter_overrides or ()}
        self.default_callback_group = object()
        self.entities: list[Entity] = []
        self.log_lines: list[str] = []
        self.destroyed = False
        self.executor: Any = None
        FakeNode.made.append(self)

    def get_name(self) -> str:
        return self.name

    def get_namespace(self) -> str:
        return self.namespace

    def get_parameters_by_prefix(self, prefix: str) -> dict[str, Any]:
        return {}

    def get_parameter(self, name: str) -> FakeParameter:
        return FakeParameter(name, False)

    def get_clock(self) -> Any:
        return FakeClock()

    def get_logger(self) -> FakeLogger:
        return FakeLogger(self.log_lines)

    def resolve_topic_name(self, topic: str, *, only_expand: bool = False) -> str:
        name = topic if topic.startswith('/') else f'{self.namespace}/{topic}'
        name = name.replace('~', f'{self.namespace}/{self.name}')
        if only_expand or not self.options['use_global_arguments']:
            return name
        return self.REMAPS.get(name, name)

    def create_subscription(self, msg_type: Any, topic: str, callback: Callable[[Any], None],
                            qos_profile: Any, *, callback_group: Any = None,
                            event_callbacks: Any = None, qos_overriding_options: Any = None,
                            raw: bool = False) -> Entity:
        entity = Entity('subscription', self.resolve_topic_name(topic), callback,
                        {'callback_group': callback_group})
        self.entities.append(entity)
        return entity

    def create_publisher(self, msg_type: Any, topic: str, qos_profile: Any, *,
                         callback_group: Any = None, event_callbacks: Any = None,
                         qos_overriding_options: Any = None, publisher_class: Any = None
                         ) -> Entity:
        entity = Entity('publisher', self.resolve_topic_name(topic), None, {})
        self.entities.append(entity)
        return entity

    def create_timer(self, timer_period_sec: float, callback: Callable[[], Any],
                     callback_group: Any = None, clock: Any = None,
                     autostart: bool = True) -> Entity:
        entity = Entity('timer', '', callback, {'callback_group': callback_group,
                                                'clock': clock, 'period': timer_period_sec})
        self.entities.append(entity)
        return entity

    def create_service(self, srv_type: Any, srv_name: str, callback: Callable[..., Any], *,
                       qos_profile: Any = None, callback_group: Any = None) -> Entity:
        entity = Entity('service', self.resolve_topic_name(srv_name), callback,
                        {'callback_group': callback_group})
        self.entities.append(entity)
        return entity

    def destroy_node(self) -> None:
        self.destroyed = True


class FakeClock:
    def __init__(self, *, clock_type: Any = None) -> None:
        self.clock_type = clock_type

    def now(self) -> Any:
        return types.SimpleNamespace(nanoseconds=time.monotonic_ns())


class FakeExecutor:
    def __init__(self, *, context: Any = None) -> None:
        self.context = context
        self.nodes: list[FakeNode] = []
        self.events: queue.Queue[Callable[[], None]] = queue.Queue()
        self.spun_on: set[str] = set()
        self.shut_down = False

    def add_node(self, node: FakeNode) -> bool:
        self.nodes.append(node)
        node.executor = self
        return True

    def spin_once(self, timeout_sec: float | None = None) -> None:
        self.spun_on.add(threading.current_thread().name)
        try:
            event = self.events.get(timeout=min(timeout_sec or 0.01, 0.01))
        except queue.Empty:
            return
        event()

    def shutdown(self, timeout_sec: float | None = None) -> bool:
        self.shut_down = True
        return True


class FakeSingleThreadedExecutor(FakeExecutor):
    pass


class FakeMultiThreadedExecutor(FakeExecutor):
    def __init__(self, num_threads: int | None = None, *, context: Any = None) -> None:
        super().__init__(context=context)


class FakeEventsExecutor(FakeExecutor):
    pass


def fake_events_executor(*, context: Any = None) -> FakeEventsExecutor:
    return FakeEventsExecutor(context=context)


def _module(name: str, **attrs: Any) -> types.ModuleType:
    mod = types.ModuleType(name)
    mod.__dict__.update(attrs)
    return mod


@pytest.fixture(params=['events', 'single'])
def rclpy_fake(request: pytest.FixtureRequest, monkeypatch: pytest.MonkeyPatch) -> str:
    """A stand-in rclpy in sys.modules; 'events': with rclpy.experimental.EventsExecutor."""
    FakeNode.made.clear()
    state = {'ok': True}
    rclpy = _module('rclpy', init=lambda *, args=None, context=None, domain_id=None,
                    signal_handler_options=None: None,
                    ok=lambda *, context=None: state['ok'],
                    try_shutdown=lambda *, context=None: state.update(ok=False))
    rclpy.__path__ = []
    modules = {
        'rclpy': rclpy,
        'rclpy.node': _module('rclpy.node', Node=FakeNode),
        'rclpy.parameter': _module('rclpy.parameter', Parameter=RclpyParameter),
        'rclpy.executors': _module('rclpy.executors',
                                   MultiThreadedExecutor=FakeMultiThreadedExecutor,
                                   SingleThreadedExecutor=FakeSingleThreadedExecutor,
                                   ExternalShutdownException=type('ExternalShutdownException',
                                                                  (Exception,), {})),
        'rclpy.callback_groups': _module('rclpy.callback_groups',
                                         MutuallyExclusiveCallbackGroup=type('MEGroup', (), {}),
                                         ReentrantCallbackGroup=type('RGroup', (), {})),
        'rclpy.signals': _module('rclpy.signals',
                                 SignalHandlerOptions=types.SimpleNamespace(NO='no')),
        'rclpy.clock': _module('rclpy.clock', Clock=FakeClock,
                               ClockType=types.SimpleNamespace(STEADY_TIME='steady')),
        'rclpy.qos': _module('rclpy.qos', DurabilityPolicy=types.SimpleNamespace(
            TRANSIENT_LOCAL=1, VOLATILE=2), HistoryPolicy=types.SimpleNamespace(KEEP_LAST=1),
            ReliabilityPolicy=types.SimpleNamespace(RELIABLE=1, BEST_EFFORT=2),
            QoSProfile=lambda **kw: kw, qos_profile_parameters='parameters',
            qos_profile_sensor_data='sensor', qos_profile_services_default='services'),
    }
    if request.param == 'events':
        modules['rclpy.experimental'] = _module('rclpy.experimental',
                                                EventsExecutor=fake_events_executor)
    else:
        modules['rclpy.experimental'] = None     # `import` raises ImportError
    for pkg in ('builtin_interfaces', 'diagnostic_msgs', 'geometry_msgs', 'lifecycle_msgs',
                'rcl_interfaces', 'rosgraph_msgs', 'sensor_msgs', 'std_msgs', 'std_srvs',
                'tf2_msgs', 'visualization_msgs'):
        parent = _module(pkg)
        parent.__path__ = []
        modules[pkg] = parent
        for kind in ('msg', 'srv'):
            modules[f'{pkg}.{kind}'] = _Messages(f'{pkg}.{kind}')
    for name, mod in modules.items():
        monkeypatch.setitem(sys.modules, name, mod)
    monkeypatch.delitem(sys.modules, 'constraint_ctrl.transport.rclpy_port', raising=False)
    return request.param


def _port() -> Any:
    from constraint_ctrl.transport.rclpy_port import RclpyPort
    return RclpyPort('constraint_controller', ['--ros-args'])


def test_control_entities_go_to_a_hidden_node_with_the_main_nodes_names(rclpy_fake: str
                                                                          ) -> None:
    port = _port()
    t = port.types
    sub = port.create_subscription(t.JointState, 'joint_states', lambda m: None, 'sensor',
                                   control=True)
    port.create_timer(0.001, lambda: None, control=True)
    port.create_subscription(t.String, 'other', lambda m: None, 'default')
    port.create_timer(0.1, lambda: None)
    main, control = FakeNode.made
    assert main.name == 'constraint_controller'
    assert control.name == '_constraint_controller_control'
    assert control.namespace == main.namespace and control.context is main.context
    # no second reading of the process's --ros-args (a `-r __node:=` would rename it too)
    assert control.options == {'use_global_arguments': False, 'enable_rosout': False,
                               'start_parameter_services': False}
    # no ~/get_type_description service (rclpy type_description_service.py) on it either:
    # every entity of that node is one more for its executor to look at on each wake
    assert control.overrides == {'start_type_description_service': False}
    # the name the main node resolved, remapping included
    assert sub.topic_name == '/robot/joint_states'
    assert [e.kind for e in control.entities] == ['subscription', 'timer']
    assert [e.kind for e in main.entities if e.kind in ('subscription', 'timer')] == \
        ['subscription', 'timer']
    executor = port.control_executor
    expected = FakeEventsExecutor if rclpy_fake == 'events' else FakeSingleThreadedExecutor
    assert type(executor) is expected
    assert port.control_executor_name == ('EventsExecutor' if rclpy_fake == 'events'
                                          else 'SingleThreadedExecutor')
    assert executor.nodes == [control] and executor.context is main.context
    assert type(port.executor) is FakeMultiThreadedExecutor and port.executor.nodes == [main]
    assert any('_constraint_controller_control' in line for line in main.log_lines)


def test_control_callbacks_run_on_their_own_thread_and_stop_with_spin(rclpy_fake: str
                                                                       ) -> None:
    port = _port()
    seen: list[str] = []
    port.create_subscription(port.types.JointState, 'joint_states',
                             lambda m: seen.append(threading.current_thread().name), 'sensor',
                             control=True)
    control = FakeNode.made[1]
    spinner = threading.Thread(target=port.spin, name='spinner')
    spinner.start()
    try:
        port.control_executor.events.put(lambda: control.entities[0].callback(object()))
        deadline = time.monotonic() + 10.0
        # eventual outcomes: the control callback ran, and the main executor spun once (on a
        # busy machine the control thread can answer before the spinner's first spin_once)
        while (not seen or 'spinner' not in port.executor.spun_on) \
                and time.monotonic() < deadline:
            time.sleep(0.01)
    finally:
        port.shutdown()            # from "a callback": ends spin()
        spinner.join(10.0)
    assert not spinner.is_alive()
    assert seen == ['constraint_controller-control']
    assert 'spinner' in port.executor.spun_on
    assert port.control_executor.spun_on == {'constraint_controller-control'}
    port.shutdown()                # after spin: tear down
    assert port.control_executor.shut_down and control.destroyed and port.executor.shut_down


def test_a_failing_control_callback_is_counted_not_fatal(rclpy_fake: str) -> None:
    port = _port()

    def bad(msg: Any) -> None:
        raise ValueError('bad sample')
    port.create_subscription(port.types.JointState, 'joint_states', bad, 'sensor', control=True)
    control = FakeNode.made[1]
    spinner = threading.Thread(target=port.spin)
    spinner.start()
    try:
        for _ in range(3):
            port.control_executor.events.put(lambda: control.entities[0].callback(object()))
        deadline = time.monotonic() + 10.0
        while time.monotonic() < deadline and not port.control_executor.events.empty():
            time.sleep(0.01)
        time.sleep(0.1)
        assert spinner.is_alive()
    finally:
        port.shutdown()
        spinner.join(10.0)
    faults = port.faults()['subscription joint_states']
    assert faults.callback_errors == 3


def test_no_control_entity_no_second_node(rclpy_fake: str) -> None:
    port = _port()
    port.create_subscription(port.types.String, 'other', lambda m: None, 'default')
    spinner = threading.Thread(target=port.spin)
    spinner.start()
    time.sleep(0.05)
    port.shutdown()
    spinner.join(10.0)
    assert len(FakeNode.made) == 1 and not port.control_executor.spun_on


def test_timer_reset_maps_to_rclpy_timer_reset(rclpy_fake: str) -> None:
    port = _port()
    timer = port.create_timer(0.001, lambda: None, control=True)
    timer.reset()
    timer.reset()
    assert timer.timer.resets == 2


def test_rcl_refusing_the_ros_args_is_a_user_error(rclpy_fake: str,
                                                   monkeypatch: pytest.MonkeyPatch) -> None:
    """rclpy.init raises rclpy's RCLError (a RuntimeError; rclpy.impl.implementation_singleton
    .rclpy_implementation.RCLError on Jazzy, seen by hand on a Jazzy core) when rcl cannot
    parse the --ros-args, e.g. a --params-file that does not exist. That is the user's input,
    not a bug: a TransportError (exit 2) with rcl's words, as the DDS transport reports its own
    reading of the same arguments."""
    from constraint_ctrl.cli import report_errors
    from constraint_ctrl.errors import TransportError
    rcl_error = type('RCLError', (RuntimeError,), {})
    impl = _module('rclpy.impl')
    impl.__path__ = []
    monkeypatch.setitem(sys.modules, 'rclpy.impl', impl)
    monkeypatch.setitem(sys.modules, 'rclpy.impl.implementation_singleton', _module(
        'rclpy.impl.implementation_singleton',
        rclpy_implementation=types.SimpleNamespace(RCLError=rcl_error)))
    text = ("failed to initialize rcl: Couldn't parse params file: '--params-file /no.yaml'. "
            'Error: Error opening YAML file, at parser.c:271')

    def refuse(**_kwargs: Any) -> None:
        raise rcl_error(text)
    monkeypatch.setattr(sys.modules['rclpy'], 'init', refuse)
    with pytest.raises(TransportError, match='Error opening YAML file'):
        _port()
    assert report_errors(_port) == 2
