"""End-to-end latency of the controller node on loopback (part of `constraint-ctrl bench`).

Processes: the controller (`constraint-ctrl run`, tick_on = joint_states: one tick per sample,
the timer as a fallback), the echo floor (tools/bench_echo.py: the same transport, QoS and
messages, no control work) and an outside peer (tools/bench_peer.py, always DDS) that publishes
joint_states at the rate and receives the answers. The peer feeds one process at a time in
short alternating blocks and pauses the others (see bench_peer.py), so the node and its floor
are measured under the same drifts of the machine's load.

Quiet part: controller and echo. Reported as before (`round_trip_us`, `missed_*`,
`latency_us` from the node's own clock, `activation`) plus `echo_floor_us`, `ratio_p99` and
`ratio_p50` (controller round trip / echo round trip) and `worst_gap_ms`.

Loaded part (`load` > 0): `load` busy-loop processes run alongside while a controller with
normal scheduling (`plain`), one started with `--realtime PRIORITY` (`realtime`) and the echo
(`echo_floor`) are measured the same way.

In both parts the peer runs SCHED_FIFO above the node's priority (where permitted, else normal
and said in `peer.scheduling`): it stands for the robot's driver, which is the real-time side
on a robot PC, so its own stalls do not count against the node or the floor.

The nodes run with watchdog.joint_state_timeout = 30 s: a node paused between its blocks would
otherwise stop on stale joint states at every resume and hold for `resume_after`; the check
itself still runs on every tick.
"""
from __future__ import annotations

import json
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import yaml

from ..nodes.common import config_dir

JOINT_STATE_TIMEOUT_S = 30.0
PEER_PRIORITY_ABOVE_NODE = 10


def _params_file(workdir: Path) -> Path:
    """config/controller.yaml for any node name and namespace (key '/**'), so the node can run
    in its own namespace."""
    data = yaml.safe_load((config_dir() / 'controller.yaml').read_text())
    params = next(iter(data.values()))['ros__parameters']
    path = workdir / 'controller_bench.yaml'
    path.write_text(yaml.safe_dump({'/**': {'ros__parameters': params}}))
    return path


def _node_command(transport: str, namespace: str, rate_hz: float, params: Path,
                  stats: Path, realtime: int | None) -> list[str]:
    cmd = [sys.executable, '-m', 'constraint_ctrl.cli', 'run', '--transport', transport,
           '--stats', str(stats)]
    if realtime is not None:
        cmd += ['--realtime', str(realtime)]
    return cmd + ['--ros-args', '--params-file', str(params), '-r', f'__ns:=/{namespace}',
                  '-p', f'rate_hz:={float(rate_hz)}', '-p', 'tick_on:=joint_states',
                  '-p', "people.sources:=['']", '-p', 'initial_skill:=keep_tool_vertical',
                  '-p', 'status_rate_hz:=2.0',
                  '-p', f'watchdog.joint_state_timeout:={JOINT_STATE_TIMEOUT_S}']


def _echo_command(transport: str, namespace: str) -> list[str]:
    return [sys.executable, '-m', 'constraint_ctrl.tools.bench_echo', '--transport', transport,
            '--ros-args', '-r', f'__ns:=/{namespace}']


def _stop(proc: subprocess.Popen) -> None:
    if proc.poll() is not None:
        return
    os.kill(proc.pid, signal.SIGCONT)
    proc.send_signal(signal.SIGINT)
    try:
        proc.wait(15)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait(5)


def _busy_loops(count: int) -> list[subprocess.Popen]:
    """`count` processes that each keep one CPU busy (normal priority)."""
    return [subprocess.Popen([sys.executable, '-c', 'while True: pass'],
                             stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            for _ in range(count)]


#: A measured process: name, 'node' | 'echo', --realtime priority (None: normal), transport.
Target = tuple[str, str, int | None, str]


def _measure(workdir: Path, rate_hz: float, seconds: float, block_s: float,
             targets: list[Target], peer_realtime: int | None,
             activation: tuple[str, int] | None) -> dict[str, Any]:
    """Start the targets, run the peer over them, stop them; the peer's results plus each
    node's own statistics."""
    env = dict(os.environ, ROS_DOMAIN_ID=str(random.randint(101, 200)), PYTHONUNBUFFERED='1')
    if any(target[3] == 'rclpy' for target in targets):
        # the peer's DDS transport answers services of rmw_cyclonedds_cpp peers only, and its
        # loopback-only discovery meets a ROS 2 node restricted to this host (README, Distro)
        env.setdefault('RMW_IMPLEMENTATION', 'rmw_cyclonedds_cpp')
        env.setdefault('ROS_AUTOMATIC_DISCOVERY_RANGE', 'LOCALHOST')
    params = _params_file(workdir)
    procs: dict[str, subprocess.Popen] = {}
    logs: dict[str, Path] = {}
    stats: dict[str, Path] = {}
    peer_targets = []
    try:
        for name, kind, realtime, transport in targets:
            logs[name] = workdir / f'{name}.log'
            if kind == 'node':
                stats[name] = workdir / f'{name}_stats.json'
                cmd = _node_command(transport, name, rate_hz, params, stats[name], realtime)
                base = f'/{name}/constraint_controller'
                events: str | None = f'{base}/events'
            else:
                cmd = _echo_command(transport, name)
                base = f'/{name}/echo_floor'
                events = None
            with logs[name].open('w') as log:
                procs[name] = subprocess.Popen(cmd, env=env, stdout=log,
                                               stderr=subprocess.STDOUT)
            peer_targets.append({'name': name, 'pid': procs[name].pid,
                                 'joint_states': f'/{name}/joint_states',
                                 'answers': f'{base}/joint_command', 'events': events})
        config = {'rate_hz': rate_hz, 'block_s': block_s, 'seconds_per_target': seconds,
                  'targets': peer_targets, 'realtime': peer_realtime,
                  'activation': ({'target': activation[0], 'count': activation[1]}
                                 if activation else None)}
        config_path = workdir / 'peer_config.json'
        result_path = workdir / 'peer_result.json'
        config_path.write_text(json.dumps(config))
        peer = subprocess.run([sys.executable, '-m', 'constraint_ctrl.tools.bench_peer',
                               str(config_path), str(result_path)], env=env,
                              capture_output=True, text=True, check=False)
        if peer.returncode != 0 or not result_path.exists():
            tail = '\n'.join((peer.stderr or '').strip().splitlines()[-5:])
            msg = f'the benchmark peer failed (exit {peer.returncode}): {tail}'
            raise RuntimeError(msg)
        result = json.loads(result_path.read_text())
    finally:
        for proc in procs.values():
            _stop(proc)
    for name, path in stats.items():
        if path.exists():
            result['targets'][name]['node'] = json.loads(path.read_text())
    return result


def _ratio(a: dict[str, Any] | None, b: dict[str, Any] | None, key: str) -> float | None:
    if not a or not b or not b.get(key):
        return None
    return round(a[key] / b[key], 3)


def _summary(target: dict[str, Any]) -> dict[str, Any]:
    """The figures of one target that the report shows side by side."""
    node = target.get('node') or {}
    out = {'round_trip_us': target['round_trip_us'], 'missed_percent': target['missed_percent'],
           'missed_ticks': target['missed_ticks'], 'samples_sent': target['samples_sent'],
           'worst_gap_ms': target['worst_gap_ms'],
           'cpu_us_per_sample': target['cpu_us_per_sample'],
           'cpu_percent': target['cpu_percent']}
    if node:
        out['latency_us'] = node.get('latency_us')
        if node.get('realtime') is not None:
            out['scheduling'] = node['realtime']
    return out


def _transport_figures(node: dict[str, Any], echo: dict[str, Any]) -> dict[str, Any]:
    own = node.get('node') or {}
    return {'round_trip_us': node['round_trip_us'], 'echo_floor_us': echo['round_trip_us'],
            'ratio_p99': _ratio(node['round_trip_us'], echo['round_trip_us'], 'p99'),
            'missed_percent': node['missed_percent'], 'worst_gap_ms': node['worst_gap_ms'],
            'echo_missed_percent': echo['missed_percent'], 'latency_us': own.get('latency_us'),
            'cpu_us_per_sample': node['cpu_us_per_sample'],
            'echo_cpu_us_per_sample': echo['cpu_us_per_sample']}


def bench_end_to_end(duration: float = 30.0, rate_hz: float = 1000.0, activations: int = 20,
                     load: int = 2, transport: str = 'dds', realtime_priority: int = 80,
                     block_s: float = 2.0) -> dict[str, Any]:
    """The quiet part, then (load > 0) the loaded part; see the module docstring.

    ``duration``: recorded seconds per measured process in each part. ``transport`` 'dds',
    'rclpy', or 'both': then the quiet part interleaves a controller and an echo on each
    transport (the main keys are the DDS ones; `transports` has both side by side) and the
    loaded part runs on DDS.
    """
    workdir = Path(tempfile.mkdtemp(prefix='ctrl_e2e_'))
    try:
        return _bench_in(workdir, duration, rate_hz, activations, load, transport,
                         realtime_priority, block_s)
    except Exception as exc:
        # the last lines of each process's log go into the error: the folder goes away
        tails = [f'{log.relative_to(workdir)}: ' + ' | '.join(
                     log.read_text(errors='replace').strip().splitlines()[-3:])
                 for log in sorted(workdir.glob('*/*.log'))]
        msg = '\n'.join([str(exc), *tails])
        raise RuntimeError(msg) from exc
    finally:
        shutil.rmtree(workdir, ignore_errors=True)


def _bench_in(workdir: Path, duration: float, rate_hz: float, activations: int, load: int,
              transport: str, realtime_priority: int, block_s: float) -> dict[str, Any]:
    block_s = min(block_s, duration)
    (workdir / 'quiet').mkdir()
    (workdir / 'loaded').mkdir()
    peer_priority = min(99, realtime_priority + PEER_PRIORITY_ABOVE_NODE)
    main_transport = 'dds' if transport == 'both' else transport
    targets: list[Target] = [('controller', 'node', None, main_transport),
                             ('echo', 'echo', None, main_transport)]
    if transport == 'both':
        targets += [('controller_rclpy', 'node', None, 'rclpy'),
                    ('echo_rclpy', 'echo', None, 'rclpy')]
    quiet = _measure(workdir / 'quiet', rate_hz, duration, block_s, targets, peer_priority,
                     ('controller', activations) if activations else None)
    node, echo = quiet['targets']['controller'], quiet['targets']['echo']
    own = node.get('node') or {}
    result: dict[str, Any] = {
        'rate_hz': rate_hz, 'transport': main_transport, 'duration_s': duration,
        'samples_sent': node['samples_sent'], 'commands_matched': node['commands_matched'],
        'missed_ticks': node['missed_ticks'], 'missed_percent': node['missed_percent'],
        'round_trip_us': node['round_trip_us'], 'worst_gap_ms': node['worst_gap_ms'],
        'latency_us': own.get('latency_us'),
        'echo_floor_us': echo['round_trip_us'],
        'echo_missed_percent': echo['missed_percent'],
        'cpu_us_per_sample': node['cpu_us_per_sample'],
        'echo_cpu_us_per_sample': echo['cpu_us_per_sample'],
        'cpu_percent': node['cpu_percent'], 'echo_cpu_percent': echo['cpu_percent'],
        'ratio_p99': _ratio(node['round_trip_us'], echo['round_trip_us'], 'p99'),
        'ratio_p50': _ratio(node['round_trip_us'], echo['round_trip_us'], 'p50'),
        'activation': quiet.get('activation'),
        'node_ticks': own.get('ticks'),
        'interleaving': {'block_s': block_s, 'blocks_per_process': node['blocks'],
                         'order': ', '.join(t[0] for t in targets) + ', then reversed each '
                                  'round; a process not fed is paused (SIGSTOP)'},
        'peer': quiet['peer'],
    }
    if result['activation'] is not None and own.get('switch_delay_ticks') is not None:
        result['activation']['node_ticks'] = own['switch_delay_ticks']
    if transport == 'both':
        figures = {'dds': _transport_figures(node, echo),
                   'rclpy': _transport_figures(quiet['targets']['controller_rclpy'],
                                               quiet['targets']['echo_rclpy'])}
        figures['rclpy_over_dds_p99'] = _ratio(figures['rclpy']['round_trip_us'],
                                               figures['dds']['round_trip_us'], 'p99')
        result['transports'] = figures
    if load > 0:
        busy = _busy_loops(load)
        try:
            time.sleep(1.0)
            loaded = _measure(workdir / 'loaded', rate_hz, duration, block_s,
                              [('plain', 'node', None, main_transport),
                               ('realtime', 'node', realtime_priority, main_transport),
                               ('echo', 'echo', None, main_transport)], peer_priority, None)
        finally:
            for proc in busy:
                proc.kill()
                proc.wait()
        result['loaded'] = {
            'busy_processes': load,
            'plain': _summary(loaded['targets']['plain']),
            'realtime': _summary(loaded['targets']['realtime']),
            'echo_floor': _summary(loaded['targets']['echo']),
            'peer': loaded['peer'],
        }
    result['targets'] = {'latency_p99_us': 250, 'ratio_p99': 2.0, 'missed_percent': 0.1,
                         'activation_ticks': 2,
                         'loaded_realtime': {'missed_percent': 0.5, 'worst_gap_ms': 5.0,
                                             'round_trip_p99_us': 2000}}
    return result


__all__ = ['bench_end_to_end']
