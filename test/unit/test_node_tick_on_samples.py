"""tick_on = joint_states: every sample gets its command, also when the fallback timer ticks.

The DDS port runs the timer and the subscriptions on different threads. A sample that arrives
while a fallback tick (the timer's) is running must still be answered by a command stamped
with it, once that tick is done; before, its own tick was skipped and the sample went
unanswered (seen in `bench` as missed ticks of the controller, not of the echo). Judged by
order and by the stamps the node published, never by time.
"""
from __future__ import annotations

import threading
from pathlib import Path
from typing import Any

from node_harness import JOINTS, NodeHarness, copy_skills


def test_a_sample_during_a_timer_tick_is_answered_after_it(tmp_path: Path) -> None:
    h = NodeHarness(copy_skills(tmp_path / 'skills', ('keep_tool_vertical',)),
                    {'initial_skill': 'keep_tool_vertical', 'rate_hz': '250.0',
                     'tick_on': 'joint_states'})
    try:
        stamps: list[tuple[int, int]] = []
        publish = h.node._pub_joint_command.publish

        def record(msg: Any) -> None:
            stamps.append((msg.header.stamp.sec, msg.header.stamp.nanosec))
            publish(msg)
        h.node._pub_joint_command.publish = record      # type: ignore[method-assign]
        for k in range(5):                               # running, with samples stamped k
            h.node._on_joint_states(_sample(h, k))
        assert stamps[-1] == (0, 4)

        inside = threading.Event()
        release = threading.Event()
        step = h.node.loop.step

        def slow_step(snap: Any) -> Any:                 # the timer's tick, held inside
            inside.set()
            release.wait(30.0)
            return step(snap)
        h.node.loop.step = slow_step                     # type: ignore[method-assign]
        timer_tick = threading.Thread(target=h.node._tick)
        timer_tick.start()
        assert inside.wait(30.0)
        h.node.loop.step = step                          # type: ignore[method-assign]
        sample_thread = threading.Thread(target=h.node._on_joint_states,
                                         args=(_sample(h, 5),))
        sample_thread.start()                            # arrives during the timer's tick
        sample_thread.join(0.5)
        release.set()
        timer_tick.join(30.0)
        sample_thread.join(30.0)
        assert not timer_tick.is_alive() and not sample_thread.is_alive()
        assert (0, 5) in stamps, f'the sample stamped 5 was never answered: {stamps[-3:]}'
    finally:
        h.close()


def _sample(h: NodeHarness, nanosec: int) -> Any:
    t = h.t
    return t.JointState(header=t.Header(stamp=t.Time(sec=0, nanosec=nanosec), frame_id=''),
                        name=list(JOINTS), position=h.q.tolist(), velocity=[], effort=[])
