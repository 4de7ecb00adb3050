"""End-to-end latency of the controller node over DDS on loopback (part of `constraint-ctrl bench`).

The controller runs as its own process with tick_on = joint_states (one tick per sample, the
timer as a fallback) and a peer in this process publishes joint_states at the given rate.

- latency_us: what the node measures on its monotonic clock from a joint_states sample arriving
  (its subscription callback) to the matching command being published (both ~/command and
  ~/joint_command written), written with `--stats` at exit;
- round_trip_us: the same path seen from the peer: sample stamped at sending -> ~/joint_command
  (which carries that stamp) received; adds two DDS hops and the peer's own Python threads;
- missed_ticks: samples the peer sent that never got their command;
- activation: Trigger request received by the node -> the tick that publishes the new skill's
  first command, in ticks (node clock); and the Trigger round trip seen by the peer.
"""
from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import threading
import time
from typing import Any

import numpy as np

from ..nodes.common import config_dir

START = [0.0, 0.3156, 0.6775, 0.0, 0.5777, 0.0]
JOINTS = [f'joint_{i}' for i in range(1, 7)]


def bench_end_to_end(duration: float = 60.0, rate_hz: float = 1000.0,
                     activations: int = 20) -> dict[str, Any]:
    import json
    import shutil
    import tempfile
    from pathlib import Path

    from ..transport.port import open_port
    stats_file = Path(tempfile.mkdtemp(prefix='ctrl_stats_')) / 'stats.json'
    env = dict(os.environ, ROS_DOMAIN_ID=str(random.randint(101, 200)), PYTHONUNBUFFERED='1')
    cfg = config_dir()
    proc = subprocess.Popen(
        [sys.executable, '-m', 'constraint_ctrl.cli', 'run', '--transport', 'dds',
         '--stats', str(stats_file), '--ros-args',
         '--params-file', str(cfg / 'controller.yaml'), '-p', f'rate_hz:={float(rate_hz)}',
         '-p', 'tick_on:=joint_states', '-p', "people.sources:=['']",
         '-p', 'initial_skill:=keep_tool_vertical', '-p', 'status_rate_hz:=2.0'],
        env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    saved = os.environ.get('ROS_DOMAIN_ID')
    os.environ['ROS_DOMAIN_ID'] = env['ROS_DOMAIN_ID']
    port = open_port('dds', 'latency_probe', ['--ros-args'])
    if saved is None:
        os.environ.pop('ROS_DOMAIN_ID', None)
    else:
        os.environ['ROS_DOMAIN_ID'] = saved
    t = port.types
    lock = threading.Lock()
    sent: list[int] = []
    latency: dict[int, int] = {}
    events: list[tuple[int, str]] = []
    recording = threading.Event()

    def on_command(msg: Any) -> None:
        now = port.now_ns()
        stamp = msg.header.stamp.sec * 1_000_000_000 + msg.header.stamp.nanosec
        if recording.is_set():
            with lock:
                latency.setdefault(stamp, now - stamp)

    def on_event(msg: Any) -> None:
        events.append((port.now_ns(), msg.data))

    port.create_subscription(t.JointState, '/constraint_controller/joint_command', on_command,
                             'default')
    port.create_subscription(t.String, '/constraint_controller/events', on_event, 'default')
    pub = port.create_publisher(t.JointState, '/joint_states', 'sensor')

    def publish() -> None:
        ns = port.now_ns()
        pub.publish(t.JointState(header=t.Header(stamp=t.Time(sec=ns // 1_000_000_000,
                                                               nanosec=ns % 1_000_000_000),
                                                 frame_id=''),
                                 name=JOINTS, position=START, velocity=[], effort=[]))
        if recording.is_set():
            with lock:
                sent.append(ns)

    timer = port.create_timer(1.0 / rate_hz, publish)
    spinner = threading.Thread(target=port.spin, daemon=True)
    spinner.start()
    result: dict[str, Any] = {'rate_hz': rate_hz, 'duration_s': duration}
    try:
        deadline = time.monotonic() + 30.0
        while not any(name == 'activated_keep_tool_vertical' for _, name in events):
            if time.monotonic() > deadline or proc.poll() is not None:
                msg = 'the controller did not start its initial skill within 30 s'
                raise RuntimeError(msg)
            time.sleep(0.05)
        time.sleep(1.0)                      # warm-up
        recording.set()
        time.sleep(duration)
        recording.clear()
        time.sleep(0.2)
        with lock:
            stamps = list(sent)
            lat = np.array([latency[s] for s in stamps if s in latency], dtype=float) / 1000.0
        missed = len(stamps) - lat.size
        result.update({
            'samples_sent': len(stamps),
            'commands_matched': int(lat.size),
            'missed_ticks': missed,
            'missed_percent': round(100.0 * missed / max(len(stamps), 1), 4),
            'round_trip_us': {'p50': round(float(np.percentile(lat, 50)), 1),
                           'p90': round(float(np.percentile(lat, 90)), 1),
                           'p99': round(float(np.percentile(lat, 99)), 1),
                           'max': round(float(lat.max()), 1)} if lat.size else None,
            'publisher_timer_missed': timer.missed,
        })
        result['activation'] = _activation_latency(port, events, activations, rate_hz)
    finally:
        port.shutdown()
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(10)
        except subprocess.TimeoutExpired:
            proc.kill()
    try:
        if stats_file.exists():
            node = json.loads(stats_file.read_text())
            result['latency_us'] = node['latency_us']
            result['activation']['node_ticks'] = node['switch_delay_ticks']
            result['node_ticks'] = node['ticks']
            result['node_timer_missed'] = node['timer_missed']
    finally:
        shutil.rmtree(stats_file.parent, ignore_errors=True)   # our temporary folder
    result['targets'] = {'latency_p99_us': 1000, 'missed_percent': 0.1, 'activation_ticks': 2}
    return result


def _activation_latency(port: Any, events: list[tuple[int, str]], count: int,
                        rate_hz: float) -> dict[str, Any]:
    t = port.types
    skills = ['reach_ramped_pose', 'keep_tool_vertical']
    clients = {s: port.create_client(t.Trigger, f'/constraint_controller/skills/{s}/activate')
               for s in skills}
    for client in clients.values():
        client.wait_for_service(10.0)
    ticks = []
    for k in range(count):
        skill = skills[k % 2]
        before = len(events)
        sent = port.now_ns()
        reply = clients[skill].call(t.Trigger.Request(), 5.0)
        if reply is None or not reply.success:
            continue
        deadline = time.monotonic() + 2.0
        stamp = None
        while stamp is None and time.monotonic() < deadline:
            for when, name in events[before:]:
                if name == f'activated_{skill}':
                    stamp = when
                    break
            time.sleep(0.001)
        if stamp is not None:
            ticks.append((stamp - sent) * 1e-9 * rate_hz)
        time.sleep(0.2)
    arr = np.array(ticks)
    return {'count': int(arr.size),
            'round_trip_ticks_p50': round(float(np.median(arr)), 2) if arr.size else None,
            'round_trip_ticks_max': round(float(arr.max()), 2) if arr.size else None,
            'note': 'round trip: Trigger request sent by the peer -> activated_<skill> event '
                    'received by it; node_ticks: request received -> new skill commanding'}


__all__ = ['bench_end_to_end']
