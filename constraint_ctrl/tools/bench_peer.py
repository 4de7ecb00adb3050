"""The outside peer of the end-to-end benchmark: it stands for the robot's driver.

Run as its own process by `bench_node.py` (`python -m constraint_ctrl.tools.bench_peer
CONFIG.json RESULT.json`), always on the DDS transport, whatever transport the measured nodes
use. It publishes joint_states at the rate, stamped with its own clock at sending, and matches
each ~/joint_command it receives to the sample it answers by that stamp.

Interleaved blocks: the measured processes ("targets": the controller, the echo floor, a
controller with --realtime) run side by side, each on its own topics (its own namespace). The
peer feeds one target at a time, in short blocks (default 2 s recorded), in turn: node, echo,
node, echo, ... so that slow drifts of the machine's load hit every target alike. A target
not being fed is paused with SIGSTOP, so it costs the machine nothing while another is
measured (the controller would otherwise keep ticking on its fallback timer); it is resumed
with SIGCONT for its next block and gets a short unrecorded warm-up first. Per block, only
samples sent in the recorded window count, and answers are awaited for a short tail after it.

Per target: round_trip_us (sample stamped at sending -> its ~/joint_command received),
missed_percent (samples of the recorded windows never answered), worst_gap_ms (largest
interval between two consecutive ~/joint_command arrivals inside a recorded window; the
controller's fallback timer also publishes, so a gap means the node itself stalled).

With `realtime` set the peer runs SCHED_FIFO at that priority with locked memory (all its
threads: set before the transport starts any), because on a robot the driver is the
real-time side; then the figures show the measured node's own scheduling, not the peer's.
"""
from __future__ import annotations

import json
import os
import signal
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

START = [0.0, 0.3156, 0.6775, 0.0, 0.5777, 0.0]
JOINTS = [f'joint_{i}' for i in range(1, 7)]


@dataclass
class Target:
    """One measured process, fed on `joint_states`, answering on `answers`."""

    name: str
    pid: int
    joint_states: str
    answers: str
    events: str | None = None          # a controller: wait for its initial skill
    ready_event: str = 'activated_keep_tool_vertical'
    sent: list[int] = field(default_factory=list)             # stamps of recorded samples
    answered: dict[int, int] = field(default_factory=dict)    # stamp -> arrival (ns)
    arrivals: list[list[int]] = field(default_factory=list)   # per block: arrival times
    events_seen: list[tuple[int, str]] = field(default_factory=list)
    first_answer: bool = False
    recording: bool = False
    publisher: Any = None
    cpu_s: float = 0.0               # the process's CPU time while it was resumed
    resumed_s: float = 0.0           # wall time it was resumed


def cpu_seconds(pid: int) -> float:
    """User + system CPU time of a process so far (/proc/<pid>/stat fields 14 and 15, in
    clock ticks; proc(5))."""
    with open(f'/proc/{pid}/stat', encoding='ascii') as f:
        fields = f.read().rsplit(')', 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf('SC_CLK_TCK')


def _stats(values_us: np.ndarray) -> dict[str, float] | None:
    if not values_us.size:
        return None
    return {'p50': round(float(np.percentile(values_us, 50)), 1),
            'p90': round(float(np.percentile(values_us, 90)), 1),
            'p99': round(float(np.percentile(values_us, 99)), 1),
            'max': round(float(values_us.max()), 1)}


def _scheduling(priority: int | None) -> str:
    """SCHED_FIFO for every thread of this process (the transport's included) and locked
    memory; done once every target answers, so the start-up of the measured processes is not
    held up by a real-time peer."""
    if not priority:
        return 'normal'
    from ..runtime.realtime import lock_memory, set_fifo, threads_named
    problems = [p for tid in threads_named(('',)) if (p := set_fifo(priority, tid))]
    memory = lock_memory()
    if problems:
        return f'normal (SCHED_FIFO {priority} refused: {problems[0]})'
    return f'SCHED_FIFO {priority}' + ('' if memory is None else f' ({memory})')


class Peer:
    def __init__(self, config: dict[str, Any]) -> None:
        self.rate_hz = float(config['rate_hz'])
        self.block_s = float(config['block_s'])
        self.warmup_s = float(config.get('warmup_s', 0.3))
        self.tail_s = float(config.get('tail_s', 0.15))
        self.seconds = float(config['seconds_per_target'])
        self.targets = [Target(**t) for t in config['targets']]
        self.realtime = config.get('realtime')
        self.scheduling = 'normal'
        from ..transport.port import open_port
        self.port = open_port('dds', 'latency_probe', ['--ros-args'])
        t = self.port.types
        self._lock = threading.Lock()
        self._feed: list[Target] = []
        self._msg = t.JointState(header=t.Header(stamp=t.Time(sec=0, nanosec=0), frame_id=''),
                                 name=JOINTS, position=START, velocity=[], effort=[])
        for target in self.targets:
            target.publisher = self.port.create_publisher(t.JointState, target.joint_states,
                                                          'sensor')
            # a deep reader history (the parameters profile: reliable, keep last 1000), so a
            # late wake-up of this process never loses an answer that the node did send
            self.port.create_subscription(t.JointState, target.answers,
                                          self._on_answer(target), 'parameters')
            if target.events:
                self.port.create_subscription(t.String, target.events,
                                              self._on_event(target), 'default')
        self.timer = self.port.create_timer(1.0 / self.rate_hz, self._publish)
        self._spinner = threading.Thread(target=self.port.spin, daemon=True)
        self._spinner.start()

    # ------------------------------------------------------------- callbacks
    def _on_answer(self, target: Target) -> Any:
        def callback(msg: Any) -> None:
            now = self.port.now_ns()
            stamp = msg.header.stamp.sec * 1_000_000_000 + msg.header.stamp.nanosec
            target.first_answer = True
            with self._lock:
                target.answered.setdefault(stamp, now)
                if target.recording:
                    target.arrivals[-1].append(now)
        return callback

    def _on_event(self, target: Target) -> Any:
        def callback(msg: Any) -> None:
            target.events_seen.append((self.port.now_ns(), msg.data))
        return callback

    def _publish(self) -> None:
        feed = self._feed
        if not feed:
            return
        ns = self.port.now_ns()
        stamp = self._msg.header.stamp
        stamp.sec, stamp.nanosec = divmod(ns, 1_000_000_000)
        for target in feed:
            target.publisher.publish(self._msg)
            if target.recording:
                with self._lock:
                    target.sent.append(ns)

    # ----------------------------------------------------------------- phases
    def wait_ready(self, timeout: float = 60.0) -> None:
        """Feed every target until each answers (and a controller runs its initial skill)."""
        self._feed = list(self.targets)
        deadline = time.monotonic() + timeout
        for target in self.targets:
            while not (target.first_answer and (
                    target.events is None
                    or any(name == target.ready_event for _, name in target.events_seen))):
                if time.monotonic() > deadline:
                    msg = f'{target.name} did not answer (or start its skill) within {timeout} s'
                    raise RuntimeError(msg)
                time.sleep(0.05)
        time.sleep(0.5)
        self._feed = []

    def _signal(self, target: Target, sig: int) -> None:
        try:
            os.kill(target.pid, sig)
        except ProcessLookupError:
            msg = f'{target.name} (pid {target.pid}) has ended'
            raise RuntimeError(msg) from None

    def blocks(self) -> None:
        rounds = max(1, int(np.ceil(self.seconds / self.block_s)))
        for target in self.targets:
            self._signal(target, signal.SIGSTOP)
        try:
            for r in range(rounds):
                # alternate the order, so no target always follows the same one
                order = self.targets if r % 2 == 0 else self.targets[::-1]
                for target in order:
                    cpu_before = cpu_seconds(target.pid)
                    resumed = time.monotonic()
                    self._signal(target, signal.SIGCONT)
                    self._feed = [target]
                    time.sleep(self.warmup_s)
                    with self._lock:
                        target.arrivals.append([])
                        target.recording = True
                    time.sleep(self.block_s)
                    with self._lock:
                        target.recording = False
                    self._feed = []
                    time.sleep(self.tail_s)
                    self._signal(target, signal.SIGSTOP)
                    time.sleep(0.01)               # let the stop take effect
                    target.cpu_s += cpu_seconds(target.pid) - cpu_before
                    target.resumed_s += time.monotonic() - resumed
        finally:
            for target in self.targets:
                try:
                    os.kill(target.pid, signal.SIGCONT)
                except ProcessLookupError:
                    pass

    def activation(self, target: Target, count: int) -> dict[str, Any]:
        """Trigger round trips to the controller `target` while it is fed continuously."""
        t = self.port.types
        base = target.answers.rsplit('/', 1)[0]
        skills = ['reach_ramped_pose', 'keep_tool_vertical']
        clients = {s: self.port.create_client(t.Trigger, f'{base}/skills/{s}/activate')
                   for s in skills}
        self._feed = [target]
        ticks = []
        try:
            for client in clients.values():
                client.wait_for_service(10.0)
            for k in range(count):
                skill = skills[k % 2]
                before = len(target.events_seen)
                sent = self.port.now_ns()
                reply = clients[skill].call(t.Trigger.Request(), 5.0)
                if reply is None or not reply.success:
                    continue
                deadline = time.monotonic() + 2.0
                stamp = None
                while stamp is None and time.monotonic() < deadline:
                    for when, name in target.events_seen[before:]:
                        if name == f'activated_{skill}':
                            stamp = when
                            break
                    time.sleep(0.001)
                if stamp is not None:
                    ticks.append((stamp - sent) * 1e-9 * self.rate_hz)
                time.sleep(0.2)
        finally:
            self._feed = []
        arr = np.array(ticks)
        return {'count': int(arr.size),
                'round_trip_ticks_p50': round(float(np.median(arr)), 2) if arr.size else None,
                'round_trip_ticks_max': round(float(arr.max()), 2) if arr.size else None,
                'note': 'round trip: Trigger request sent by the peer -> activated_<skill> '
                        'event received by it; node_ticks: request received -> new skill '
                        'commanding'}

    def results(self) -> dict[str, Any]:
        time.sleep(0.1)
        out: dict[str, Any] = {}
        with self._lock:
            for target in self.targets:
                sent = list(target.sent)
                lat = np.array([target.answered[s] - s for s in sent if s in target.answered],
                               dtype=float) / 1000.0
                gaps = [float(np.diff(np.sort(block)).max()) for block in target.arrivals
                        if len(block) > 1]
                missed = len(sent) - lat.size
                out[target.name] = {
                    'round_trip_us': _stats(lat),
                    'samples_sent': len(sent),
                    'commands_matched': int(lat.size),
                    'missed_ticks': missed,
                    'missed_percent': round(100.0 * missed / max(len(sent), 1), 4),
                    'worst_gap_ms': round(max(gaps) / 1e6, 3) if gaps else None,
                    'blocks': len(target.arrivals),
                    # whole process while resumed (warm-up and tail included): per sample
                    # sent in a recorded window, and in percent of one core
                    'cpu_us_per_sample': round(1e6 * target.cpu_s / max(len(sent), 1), 1),
                    'cpu_percent': round(100.0 * target.cpu_s / max(target.resumed_s, 1e-9),
                                         1),
                }
        return out

    def close(self) -> None:
        self.port.shutdown()


def run(config: dict[str, Any]) -> dict[str, Any]:
    peer = Peer(config)
    try:
        peer.wait_ready()
        peer.scheduling = _scheduling(peer.realtime)
        peer.blocks()
        result: dict[str, Any] = {'targets': peer.results(),
                                  'peer': {'scheduling': peer.scheduling,
                                           'timer_missed': peer.timer.missed,
                                           'transport': 'dds'}}
        activation = config.get('activation')
        if activation:
            target = next(t for t in peer.targets if t.name == activation['target'])
            result['activation'] = peer.activation(target, int(activation['count']))
        return result
    finally:
        peer.close()


def main(argv: list[str]) -> int:
    config = json.loads(Path(argv[0]).read_text())
    result = run(config)
    Path(argv[1]).write_text(json.dumps(result, indent=2) + '\n')
    return 0


if __name__ == '__main__':
    sys.exit(main(sys.argv[1:]))
