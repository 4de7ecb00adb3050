"""Plumbing of `bench`'s end_to_end section (tools/bench_node.py, bench_peer.py, bench_echo.py).

A short run: the keys the README documents are there and the numbers hang together (counts,
percentiles in order, ratios equal to the figures they are made of). No time is asserted: the
figures themselves belong to `constraint-ctrl bench`.
"""
from __future__ import annotations

import pytest

from constraint_ctrl.cli import build_parser

pytestmark = pytest.mark.integration


def _percentiles_in_order(stats: dict) -> None:
    assert set(stats) == {'p50', 'p90', 'p99', 'max'}
    assert 0.0 < stats['p50'] <= stats['p90'] <= stats['p99'] <= stats['max']


def _target(part: dict) -> None:
    _percentiles_in_order(part['round_trip_us'])
    assert part['samples_sent'] > 0
    assert 0 <= part['missed_ticks'] <= part['samples_sent']
    assert part['missed_percent'] == pytest.approx(
        100.0 * part['missed_ticks'] / part['samples_sent'], abs=1e-3)
    assert part['worst_gap_ms'] is not None and part['worst_gap_ms'] > 0.0
    assert part['cpu_us_per_sample'] > 0.0 and part['cpu_percent'] > 0.0


def test_end_to_end_keys_and_numbers_hang_together() -> None:
    from constraint_ctrl.tools.bench_node import bench_end_to_end
    rate, seconds = 500.0, 2.0
    r = bench_end_to_end(duration=seconds, rate_hz=rate, activations=2, load=1, block_s=1.0)
    _target(r)
    _percentiles_in_order(r['echo_floor_us'])
    assert r['ratio_p99'] == pytest.approx(r['round_trip_us']['p99'] / r['echo_floor_us']['p99'],
                                           abs=1e-3)
    assert r['ratio_p50'] == pytest.approx(r['round_trip_us']['p50'] / r['echo_floor_us']['p50'],
                                           abs=1e-3)
    # the peer's timer cannot send more than the rate allows in the recorded windows
    assert r['samples_sent'] <= rate * seconds * 1.05 + 5
    assert r['interleaving']['blocks_per_process'] == 2
    own = r['latency_us']            # the node's own clock: sample arrival -> command out
    assert own['samples'] > 0
    _percentiles_in_order({k: own[k] for k in ('p50', 'p90', 'p99', 'max')})
    assert r['activation']['count'] >= 1
    loaded = r['loaded']
    assert loaded['busy_processes'] == 1
    for name in ('plain', 'realtime', 'echo_floor'):
        _target(loaded[name])
    scheduling = loaded['realtime']['scheduling']
    assert scheduling['priority'] == 80
    # granted (this sandbox runs as root) or refused with a reason: never silent
    assert scheduling['threads'] or scheduling['refused']
    assert 'scheduling' not in loaded['plain']
    assert loaded['peer']['scheduling']


def test_bench_options_reach_the_section() -> None:
    args = build_parser().parse_args(['bench', '--load', '0', '--transport', 'rclpy',
                                      '--realtime', '70'])
    assert (args.load, args.transport, args.realtime) == (0, 'rclpy', 70)
    for bad in (['--load', '-1'], ['--realtime', '0'], ['--realtime', '100']):
        with pytest.raises(SystemExit):
            build_parser().parse_args(['bench', *bad])
