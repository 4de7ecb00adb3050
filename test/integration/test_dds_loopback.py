"""By default a node on the DDS transport receives only over loopback (issue 8 item 6).

A node process is started; `ss -uanp` (iproute2) lists its UDP sockets. Every one must be
bound to 127.0.0.1 / ::1, or bound to the loopback device (ss prints `0.0.0.0%lo:port`, the
SO_BINDTODEVICE of socket(7)): either way no datagram from another host reaches it. With
CYCLONEDDS_URI set by the user the port leaves Cyclone's sockets alone (multi-host use).
"""
from __future__ import annotations

import os
import random
import re
import shutil
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

pytestmark = pytest.mark.integration
ROOT = Path(__file__).resolve().parents[2]
PEER = Path(__file__).with_name('dds_peer_helper.py')
LOCAL = re.compile(r'^(?P<addr>\S+?)(?:%(?P<dev>[\w.-]+))?:(?P<port>\d+|\*)$')


def udp_sockets(pid: int) -> list[str]:
    """Local address column of every UDP socket of the process."""
    out = subprocess.run(['ss', '-uanp'], capture_output=True, text=True, check=True).stdout
    return [line.split()[3] for line in out.splitlines() if f'pid={pid},' in line]


def is_loopback_only(local: str) -> bool:
    match = LOCAL.match(local)
    assert match, local
    addr, dev = match['addr'].strip('[]'), match['dev']
    return addr in ('127.0.0.1', '::1') or (dev == 'lo' and addr in ('0.0.0.0', '*', '::'))


@pytest.fixture()
def start_node() -> Iterator[object]:
    if shutil.which('ss') is None:
        pytest.skip('`ss` (iproute2) is not installed: cannot list the sockets of a process')
    procs: list[subprocess.Popen[str]] = []

    def start(extra_env: dict[str, str]) -> subprocess.Popen[str]:
        env = {k: v for k, v in os.environ.items() if k != 'CYCLONEDDS_URI'}
        env.update(PYTHONPATH=str(ROOT), ROS_DOMAIN_ID=str(random.randint(150, 230)),
                   **extra_env)
        proc = subprocess.Popen([sys.executable, str(PEER), '--ros-args', '-r',
                                 f'__ns:=/lo{os.getpid()}'], env=env, stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, text=True)
        procs.append(proc)
        line = proc.stdout.readline() if proc.stdout else ''
        assert line.startswith('READY'), proc.stderr.read() if proc.stderr else line
        return proc
    yield start
    for proc in procs:
        proc.terminate()
        proc.wait(10)


def test_every_udp_socket_of_a_node_is_loopback_only(start_node: object) -> None:
    proc = start_node({})  # type: ignore[operator]
    sockets = udp_sockets(proc.pid)
    assert len(sockets) >= 3, sockets         # discovery, data, transmit (Cyclone)
    assert [s for s in sockets if not is_loopback_only(s)] == [], sockets


def test_a_user_configuration_is_left_alone(start_node: object) -> None:
    """CYCLONEDDS_URI given: Cyclone's own choice stands (here: its receive sockets on the
    any-address, which a multi-host setup needs)."""
    config = ('<CycloneDDS><Domain Id="any"><General><Interfaces><NetworkInterface '
              'address="127.0.0.1"/></Interfaces><AllowMulticast>false</AllowMulticast>'
              '</General></Domain></CycloneDDS>')
    proc = start_node({'CYCLONEDDS_URI': config})  # type: ignore[operator]
    sockets = udp_sockets(proc.pid)
    assert any(not is_loopback_only(s) for s in sockets), sockets
