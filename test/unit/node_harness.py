"""The controller node in this process on a DDS port that never spins: tests call its callbacks.

Without spin() no timer, subscription or service callback runs by itself, so a test drives the
node exactly: it hands messages to the subscription callbacks, runs ticks, and calls the
service and parameter handlers the port would call. Publishing works (nobody listens; the
domain is random). What the node published is recorded from ``_send`` / ``_send_status``.
"""
from __future__ import annotations

import os
import random
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from constraint_ctrl.nodes.controller_node import ControllerNode
from constraint_ctrl.runtime.loop import LoopOutput
from constraint_ctrl.transport.port import open_port

ROOT = Path(__file__).resolve().parents[2]
CONFIG = ROOT / 'config'
JOINTS = [f'joint_{i}' for i in range(1, 7)]
START = [0.0, 0.0415, 0.6889, 0.0, 0.8404, 3.1416]


def copy_skills(folder: Path, names: tuple[str, ...]) -> Path:
    """Copy skill files from config/skills with absolute robot and scene paths."""
    folder.mkdir(parents=True, exist_ok=True)
    for name in names:
        text = (CONFIG / 'skills' / f'{name}.yaml').read_text()
        text = text.replace('../robots/', f'{CONFIG / "robots"}/')
        text = text.replace('../scenes/', f'{CONFIG / "scenes"}/')
        (folder / f'{name}.yaml').write_text(text)
    return folder


class NodeHarness:
    def __init__(self, skills: Path, params: dict[str, str] | None = None,
                 params_file: Path | None = None) -> None:
        argv = ['--ros-args']
        if params_file is not None:
            argv += ['--params-file', str(params_file)]
        argv += ['-p', f'skills_folder:={skills}']
        for key, value in (params or {}).items():
            argv += ['-p', f'{key}:={value}']
        old = os.environ.get('ROS_DOMAIN_ID')
        os.environ['ROS_DOMAIN_ID'] = str(random.randint(120, 200))
        try:
            self.port = open_port('dds', 'constraint_controller', argv)
        finally:
            if old is None:
                os.environ.pop('ROS_DOMAIN_ID', None)
            else:
                os.environ['ROS_DOMAIN_ID'] = old
        self.logs: list[tuple[str, str]] = []
        log = self.port.log

        def recording_log(level: str, text: str) -> None:
            self.logs.append((level, text))
            log(level, text)
        self.port.log = recording_log            # type: ignore[method-assign]
        self.node = ControllerNode(self.port)
        if not self.node.lifecycle.trigger('configure'):   # the reason is in the log
            from constraint_ctrl.errors import ConstraintCtrlError
            self.port.shutdown()
            raise ConstraintCtrlError(next(text for level, text in reversed(self.logs)
                                           if 'configure failed' in text))
        assert self.node.lifecycle.trigger('activate')
        self.t = self.port.types
        self.q = np.array(START, dtype=float)     # the robot: integrates the commands
        # a person far away on every configured source (a stale source stops the arm)
        self.people = {src: self.node._person_callback(src)
                       for src in self.node.loop.person_sources}
        self.outputs: list[LoopOutput] = []
        self.statuses: list[Any] = []
        self.events: list[str] = []
        send, send_status = self.node._send, self.node._send_status

        def record(out: LoopOutput) -> None:
            self.outputs.append(out)
            self.events.extend(out.events)
            send(out)

        def record_status(out: LoopOutput) -> None:
            send_status(out)
            self.statuses.append(out)
        self.node._send = record                 # type: ignore[method-assign]
        self.node._send_status = record_status   # type: ignore[method-assign]

    def joint_states(self, names: list[str], positions: list[float]) -> Any:
        t = self.t
        return t.JointState(header=t.Header(stamp=t.Time(sec=0, nanosec=0), frame_id=''),
                            name=list(names), position=list(positions), velocity=[], effort=[])

    def feed(self, names: list[str] = JOINTS, positions: list[float] | None = None) -> None:
        self.node._on_joint_states(self.joint_states(
            names, self.q.tolist() if positions is None else positions))
        t = self.t
        for callback in self.people.values():
            callback(t.PointStamped(header=t.Header(stamp=t.Time(sec=0, nanosec=0),
                                                    frame_id='base_link'),
                                    point=t.Point(x=3.0, y=3.0, z=1.0)))

    def tick(self) -> LoopOutput:
        before = len(self.outputs)
        self.node._tick()
        assert len(self.outputs) == before + 1, 'the tick published no command'
        out = self.outputs[-1]
        self.q = self.q + self.node.dt * out.command
        return out

    def run(self, ticks: int) -> list[LoopOutput]:
        """Fresh joint states, then a tick, ``ticks`` times."""
        outs = []
        for _ in range(ticks):
            self.feed()
            outs.append(self.tick())
        return outs

    def status_values(self) -> dict[str, str]:
        """The controller status entries as ~/status would carry them now."""
        msg = self._status_message()
        return {kv.key: kv.value for kv in msg.status[0].values}

    def _status_message(self) -> Any:
        captured: list[Any] = []
        pub = self.node._pub_status
        original = pub.publish
        pub.publish = captured.append            # type: ignore[method-assign]
        try:
            # what the status thread publishes, built here and now (StatusWorker's job)
            self.node._publish_status(*self.node._status_job(self.outputs[-1]))
        finally:
            pub.publish = original               # type: ignore[method-assign]
        return captured[-1]

    def reload(self) -> Any:
        return self.node._on_reload(self.t.Trigger.Request(), self.t.Trigger.Response())

    def while_ticking(self, call: Callable[[], Any], max_ticks: int = 2000) -> Any:
        """Run ``call`` (a service or parameter handler that waits for a tick) on its own
        thread, as the port's service thread would, and tick until it returns."""
        result: list[Any] = []
        worker = threading.Thread(target=lambda: result.append(call()))
        worker.start()
        for _ in range(max_ticks):
            if not worker.is_alive():
                break
            self.feed()
            before = len(self.outputs)
            self.node._tick()
            if len(self.outputs) > before:
                self.q = self.q + self.node.dt * self.outputs[-1].command
            time.sleep(0.001)
        worker.join(10.0)
        assert result, 'the handler never returned'
        return result[0]

    def activate(self, skill: str) -> Any:
        """~/skills/<skill>/activate as a peer would call it."""
        handle = self.node._services[skill]
        return self.while_ticking(lambda: handle._callback(self.t.Trigger.Request(),
                                                           self.t.Trigger.Response()))

    def set_parameters(self, values: dict[str, Any]) -> tuple[bool, str]:
        """SetParametersAtomically as the port serves it (validator, store, listeners)."""
        return self.port._params.set_atomically(values)

    def set_while_ticking(self, values: dict[str, Any]) -> tuple[bool, str]:
        """The same for a call that waits for a tick (activate_skill)."""
        return self.while_ticking(lambda: self.set_parameters(values))

    def get(self, name: str) -> Any:
        return self.port.get_parameter(name).value

    def describe(self, name: str) -> Any:
        t = self.t
        return self.port._params.on_describe_parameters(
            t.DescribeParameters.Request(names=[name]),
            t.DescribeParameters.Response()).descriptors[0]

    def close(self) -> None:
        self.node._closing = True
        self.port.shutdown()


def moving(out: LoopOutput) -> bool:
    return bool(np.abs(out.command).max() > 1e-6)


__all__ = ['CONFIG', 'JOINTS', 'NodeHarness', 'START', 'copy_skills', 'moving']
