"""How the DDS port finds peers and how ROS 2 tools find the node.

Peers: Cyclone reads its configuration from the CYCLONEDDS_URI environment variable when the
first participant is created. If the user has not set it, the port sets LOOPBACK_CONFIG:
loopback only (127.0.0.1), no multicast (Linux `lo` has no MULTICAST flag), unicast discovery
to participant-index ports on localhost — the same shape rmw_cyclonedds generates for
ROS_AUTOMATIC_DISCOVERY_RANGE=LOCALHOST, so ROS nodes started with that setting (or, on
Humble, ROS_LOCALHOST_ONLY=1) see the port.

That configuration selects the interface Cyclone sends on, but Cyclone 0.10 and 11 bind their
unicast receive sockets (discovery and data) to the any-address whatever the configuration
(cyclonedds src/core/ddsi/src/ddsi_udp.c, `ddsi_udp_create_conn`: `bind_to_any = true` for
DDSI_TRAN_QOS_RECV_UC, tags 0.10.5 and 11.0.1; only its unreleased main branch binds per
interface, and only with more than one interface). No setting of General (Interfaces,
DontRoute, AllowMulticast, ExternalNetworkAddress, MulticastRecvNetworkInterfaceAddresses)
changes that. So, with our configuration, `confine_to_loopback` binds the sockets Cyclone
opened on the any-address to the loopback device right after the participant is created
(SO_BINDTODEVICE "lo", socket(7); allowed without privileges on a socket not yet bound to a
device since Linux 5.7 (from memory), and as root before; where it is refused the port logs
a warning and goes on): the sockets then receive only what arrives over `lo`, i.e. from
this machine. `ss -uanp` shows them as `0.0.0.0%lo:<port>`.

To reach other hosts, or ROS nodes using the default subnet discovery, set CYCLONEDDS_URI
yourself (the port then leaves Cyclone's sockets as Cyclone makes them), e.g.
`export CYCLONEDDS_URI='<CycloneDDS><Domain Id="any"><General><Interfaces><NetworkInterface
name="eth0"/></Interfaces></General></Domain></CycloneDDS>'`. The domain is ROS_DOMAIN_ID
(default 0), as in ROS. README "Running on more than one machine" gives the configuration we
recommend for a cell (unicast peers, multicast off); test/integration/test_multihost.py runs the
demo with it across three network namespaces.

Nodes: `ros2 node list` is built only from rmw_dds_common/ParticipantEntitiesInfo samples on
the DDS topic `ros_discovery_info` (reliable, transient local, keep last 1). Each sample holds
the participant GID and, per node, the GIDs of its readers and writers; receivers replace
their whole view of the participant with every sample, so the complete state is sent after
every change and an empty node list before the participant goes away. A GID is the 16-byte
DDS GUID (zero-padded to 24 bytes on Humble).
"""
from __future__ import annotations

import os
import socket
import threading
import weakref
from pathlib import Path
from typing import Any

from cyclonedds.pub import DataWriter
from cyclonedds.topic import Topic

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport import dds_raw
from constraint_ctrl.transport.dds_qos import type_hash_tag, writer_qos
from constraint_ctrl.transport.dds_types import codec_of
from constraint_ctrl.transport.qos import DISCOVERY_INFO

LOOPBACK_CONFIG = (
    '<CycloneDDS><Domain Id="any">'
    '<General><Interfaces><NetworkInterface address="127.0.0.1"/></Interfaces>'
    '<AllowMulticast>false</AllowMulticast></General>'
    '<Discovery><ParticipantIndex>auto</ParticipantIndex>'
    '<MaxAutoParticipantIndex>32</MaxAutoParticipantIndex>'
    '<Peers><Peer address="127.0.0.1"/></Peers></Discovery>'
    '</Domain></CycloneDDS>')
DISCOVERY_TOPIC = 'ros_discovery_info'


def ensure_cyclone_config() -> bool:
    """Set CYCLONEDDS_URI to LOOPBACK_CONFIG unless the user set it; True if our loopback
    configuration is the one in force (set now or by an earlier port of this process)."""
    if not os.environ.get('CYCLONEDDS_URI'):
        os.environ['CYCLONEDDS_URI'] = LOOPBACK_CONFIG
    return os.environ['CYCLONEDDS_URI'] == LOOPBACK_CONFIG


def socket_inodes() -> dict[int, int]:
    """{socket inode: fd} of this process (Linux /proc; empty elsewhere)."""
    found: dict[int, int] = {}
    fd_dir = Path('/proc/self/fd')
    if not fd_dir.is_dir():
        return found
    for entry in fd_dir.iterdir():
        try:
            target = os.readlink(entry)
        except OSError:
            continue
        if target.startswith('socket:['):
            found[int(target[8:-1])] = int(entry.name)
    return found


def _any_address_udp_inodes() -> set[int]:
    """Inodes of the machine's UDP sockets bound to 0.0.0.0 or :: (/proc/net/udp, udp6)."""
    found: set[int] = set()
    for table in ('/proc/net/udp', '/proc/net/udp6'):
        try:
            lines = Path(table).read_text().splitlines()[1:]
        except OSError:
            continue
        for line in lines:
            fields = line.split()
            if len(fields) > 9 and set(fields[1].split(':')[0]) == {'0'}:
                found.add(int(fields[9]))
    return found


def confine_to_loopback(before: dict[int, int]) -> tuple[int, str]:
    """Bind the UDP sockets opened since `before` (socket_inodes() taken just before the
    participant was created) that listen on the any-address to the loopback device.

    Returns (number of sockets confined, problem or ''); see the module docstring for why."""
    option = getattr(socket, 'SO_BINDTODEVICE', None)
    if option is None:
        return 0, 'this system has no SO_BINDTODEVICE'
    new = {inode: fd for inode, fd in socket_inodes().items() if inode not in before}
    targets = [fd for inode, fd in new.items() if inode in _any_address_udp_inodes()]
    done = 0
    for fd in targets:
        try:
            sock = socket.socket(fileno=os.dup(fd))
        except OSError:
            continue
        try:
            sock.setsockopt(socket.SOL_SOCKET, option, b'lo\0')
            done += 1
        except OSError as exc:
            return done, f'SO_BINDTODEVICE refused: {exc}'
        finally:
            sock.close()
    return done, ''


def domain_id() -> int:
    text = os.environ.get('ROS_DOMAIN_ID', '').strip()
    if not text:
        return 0
    try:
        value = int(text)
    except ValueError:
        value = -1
    if not 0 <= value <= 232:
        msg = f'ROS_DOMAIN_ID={text!r} must be an integer in 0..232'
        raise TransportError(msg)
    return value


def gid_of(entity: Any, gid_type: type) -> Any:
    return gid_type(data=entity.guid.bytes.ljust(len(gid_type().data), b'\0'))


class NodeAnnouncer:
    """Keeps `ros_discovery_info` in step with the node's readers and writers.

    Endpoints are keyed by GUID; one whose Python object is garbage collected (a client the
    node dropped) leaves the record with the next update.
    """

    def __init__(self, participant: Any, types: Any, namespace: str, node_name: str,
                 distro: str) -> None:
        self._participant = participant
        self._types = types
        self._namespace = namespace
        self._node_name = node_name
        self._lock = threading.Lock()
        self._readers: dict[bytes, Any] = {}
        self._writers: dict[bytes, Any] = {}
        self._dead: list[bytes] = []
        topic = Topic(participant, DISCOVERY_TOPIC, types.ParticipantEntitiesInfo)
        self.writer = DataWriter(participant, topic, writer_qos(
            DISCOVERY_INFO, type_hash_tag('rmw_dds_common/msg/ParticipantEntitiesInfo', distro)))

    def update(self, *, readers: tuple[Any, ...] = (), writers: tuple[Any, ...] = (),
               removed: tuple[Any, ...] = ()) -> None:
        with self._lock:
            for table, entities in ((self._readers, readers), (self._writers, writers)):
                for entity in entities:
                    key = entity.guid.bytes
                    table[key] = gid_of(entity, self._types.Gid)
                    weakref.finalize(entity, self._dead.append, key)
            gone = [entity.guid.bytes for entity in removed]
            while self._dead:
                gone.append(self._dead.pop())
            for key in gone:
                self._readers.pop(key, None)
                self._writers.pop(key, None)
            sample = self.sample()
            dds_raw.write(self.writer, codec_of(type(sample)).encode(sample))

    def sample(self, *, with_node: bool = True) -> Any:
        t = self._types
        nodes = [t.NodeEntitiesInfo(node_namespace=self._namespace, node_name=self._node_name,
                                    reader_gid_seq=list(self._readers.values()),
                                    writer_gid_seq=list(self._writers.values()))]
        return t.ParticipantEntitiesInfo(gid=gid_of(self._participant, t.Gid),
                                         node_entities_info_seq=nodes if with_node else [])

    def withdraw(self) -> None:
        """Announce that the participant has no nodes any more."""
        with self._lock:
            sample = self.sample(with_node=False)
            dds_raw.write(self.writer, codec_of(type(sample)).encode(sample))
