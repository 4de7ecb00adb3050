"""A node whose reliable reader died without saying goodbye still shuts down cleanly.

A peer killed with SIGKILL (or cut off by the network) stays matched until its lease runs out,
so what the node writes afterwards is never acknowledged: shutdown()'s wait for
acknowledgements then ends by its timeout. cyclonedds-python 11.0.1's DataWriter.wait_for_acks
raises AttributeError on that timeout instead of returning False (cyclonedds/pub.py compares
with `Exception.DDS_RETCODE_TIMEOUT`), which ended the node's shutdown half-way, with exit code 1
and the participant never deleted. Seen when a `constraint-ctrl echo` was killed before the
controller was stopped.
"""
from __future__ import annotations

import os
import random
import subprocess
import sys
from pathlib import Path

import pytest

pytest.importorskip('cyclonedds')

pytestmark = pytest.mark.integration
ROOT = Path(__file__).resolve().parents[2]
DOMAIN = str(random.randint(150, 230))

READER = '''
import threading, time
from constraint_ctrl.transport.port import open_port
port = open_port("dds", "doomed_reader", [])
port.create_subscription(port.types.String, "/unacked", lambda m: None, "default")
threading.Thread(target=port.spin, daemon=True).start()
print("READY", flush=True)
time.sleep(120)
'''

WRITER = '''
import sys, time
from constraint_ctrl.transport.port import open_port
port = open_port("dds", "writer", [])
pub = port.create_publisher(port.types.String, "/unacked", "default")
deadline = time.monotonic() + 60
while not pub.writer.get_matched_subscriptions():
    if time.monotonic() > deadline:
        sys.exit("the reader was never matched")
    time.sleep(0.05)
print("MATCHED", flush=True)
sys.stdin.readline()                    # the test kills the reader, then says go on
for _ in range(50):
    pub.publish(port.types.String(data="x" * 1000))
port.shutdown()
print("SHUT DOWN", flush=True)
'''


def test_shutdown_survives_a_reader_that_never_acknowledges() -> None:
    env = {**os.environ, 'ROS_DOMAIN_ID': DOMAIN, 'PYTHONPATH': str(ROOT)}
    reader = subprocess.Popen([sys.executable, '-c', READER], env=env, stdout=subprocess.PIPE,
                              text=True)
    writer = None
    try:
        assert reader.stdout is not None and reader.stdout.readline().startswith('READY')
        writer = subprocess.Popen([sys.executable, '-c', WRITER], env=env,
                                  stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                  stderr=subprocess.PIPE, text=True)
        assert writer.stdout is not None and writer.stdout.readline().startswith('MATCHED')
        reader.kill()                   # no goodbye: the writer keeps it matched for its lease
        reader.wait(30)
        out, err = writer.communicate('go\n', timeout=120)
        assert writer.returncode == 0, err
        assert 'SHUT DOWN' in out
    finally:
        for proc in (reader, writer):
            if proc is not None and proc.poll() is None:
                proc.kill()
                proc.wait(10)
