"""ROS 2 services over plain DDS, framed the way rmw_cyclonedds_cpp frames them.

Request topic `rq<name>Request`, reply topic `rr<name>Reply`; each sample starts with the
16-byte header `{uint64 guid; int64 seq}`. A server echoes guid and seq verbatim; a client
picks a random non-zero guid, counts seq up from 1 and ignores replies carrying another guid.
Endpoints carry rmw_cyclonedds' USER_DATA tags (`serviceid=<id>;` on the server's request
reader and reply writer, `clientid=<id>;` on the client's request writer and reply reader) so
both sides can tell when the other has discovered the endpoints a call needs:

* a client calls only once its request writer has matched a request reader and its reply
  reader has matched a reply writer of the same service instance (same `serviceid`);
* a server, before replying, waits up to 100 ms (10 ms steps) for its reply writer to match the
  caller's reply reader (same `clientid`), as rmw_cyclonedds does, so first replies are not lost.

Only peers on rmw_cyclonedds_cpp (or Connext in its Cyclone compatibility mode) use this
header; Fast DDS peers frame services differently and cannot call or serve us.
"""
from __future__ import annotations

import itertools
import secrets
import threading
import time
from collections.abc import Callable
from typing import Any

from cyclonedds.core import DDSException, ReadCondition, WaitSet
from cyclonedds.pub import DataWriter
from cyclonedds.sub import DataReader
from cyclonedds.topic import Topic
from cyclonedds.util import duration

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport import dds_raw
from constraint_ctrl.transport.dds_qos import reader_qos, tag_value, user_data_of, writer_qos
from constraint_ctrl.transport.dds_types import ServiceType
from constraint_ctrl.transport.qos import QosProfile
from constraint_ctrl.transport.ros_args import reply_dds_name, request_dds_name

_REPLY_READER_WAIT_S = 0.1
_POLL_S = 0.01
_U64 = 0xFFFF_FFFF_FFFF_FFFF
_ids = itertools.count(1)


def endpoint_id(participant: Any) -> str:
    """Opaque, unique id for USER_DATA: participant GUID plus a process-wide counter."""
    return f'{participant.guid.hex}.{next(_ids):x}'


def _ids_of(endpoint_data: list[Any], key: str) -> set[str]:
    found = set()
    for data in endpoint_data:
        if data is None:
            continue
        value = tag_value(user_data_of(data.qos), key)
        if value is not None:
            found.add(value)
    return found


def _check_srv_type(srv_type: Any) -> ServiceType:
    if not isinstance(srv_type, ServiceType):
        msg = f'{srv_type!r} is not a service type of the DDS port; use port.types.<Service>'
        raise TransportError(msg)
    return srv_type


class ServiceServer:
    """Request reader + reply writer; the port's service dispatcher decodes each request with
    `decode` and runs `handle` (an exception there is counted by the dispatcher: no reply)."""

    def __init__(self, participant: Any, srv_type: Any, fqn: str,
                 callback: Callable[[Any, Any], Any], qos: QosProfile) -> None:
        self.srv_type = _check_srv_type(srv_type)
        self.name = fqn
        self.closed = False
        self._callback = callback
        tag = f'serviceid={endpoint_id(participant)};'.encode()
        req_topic = Topic(participant, request_dds_name(fqn), self.srv_type.RequestWire)
        rep_topic = Topic(participant, reply_dds_name(fqn), self.srv_type.ResponseWire)
        self.reader = DataReader(participant, req_topic, reader_qos(qos, tag))
        self.writer = DataWriter(participant, rep_topic, writer_qos(qos, tag))

    def decode(self, data: bytes) -> tuple[int, int, Any]:
        return self.srv_type.request_codec.decode(data)

    def handle(self, request: tuple[int, int, Any], info: Any) -> None:
        if self.closed:
            return
        guid, seq, body = request
        response = self._callback(body, self.srv_type.Response())
        if not isinstance(response, self.srv_type.Response):
            msg = (f'service {self.name}: callback returned {type(response).__name__}, '
                   f'expected the {self.srv_type.ros_type} response it was given')
            raise TransportError(msg)
        if self.closed:  # destroyed by its own callback (or meanwhile): no reply
            return
        try:
            self._wait_for_reply_reader(info.publication_handle)
            dds_raw.write(self.writer, self.srv_type.response_codec.encode(guid, seq, response))
        except DDSException:
            if not self.closed:
                raise

    def _wait_for_reply_reader(self, request_writer: int) -> None:
        client = tag_value(user_data_of(_matched_pub(self.reader, request_writer)), 'clientid')
        if client is None:
            return  # caller without a clientid tag: assume ready, as rmw_cyclonedds does
        deadline = time.monotonic() + _REPLY_READER_WAIT_S
        while True:
            matched = [self.writer.get_matched_subscription_data(h)
                       for h in self.writer.get_matched_subscriptions()]
            if client in _ids_of(matched, 'clientid') or time.monotonic() >= deadline:
                return
            time.sleep(_POLL_S)


def _matched_pub(reader: Any, handle: int) -> Any:
    data = reader.get_matched_publication_data(handle)
    return data.qos if data is not None else None


class ServiceClient:
    """Request writer + reply reader; calls block the calling thread, never the dispatchers."""

    def __init__(self, participant: Any, srv_type: Any, fqn: str, qos: QosProfile) -> None:
        self.srv_type = _check_srv_type(srv_type)
        self.name = fqn
        self.guid = secrets.randbits(64) or 1
        self._seq = 0
        self._lock = threading.Lock()
        tag = f'clientid={endpoint_id(participant)};'.encode()
        req_topic = Topic(participant, request_dds_name(fqn), self.srv_type.RequestWire)
        rep_topic = Topic(participant, reply_dds_name(fqn), self.srv_type.ResponseWire)
        self.writer = DataWriter(participant, req_topic, writer_qos(qos, tag))
        self.reader = DataReader(participant, rep_topic, reader_qos(qos, tag))
        self._waitset = WaitSet(participant)
        self._waitset.attach(ReadCondition(self.reader, dds_raw.NOT_READ))

    def service_is_ready(self) -> bool:
        readers = [self.writer.get_matched_subscription_data(h)
                   for h in self.writer.get_matched_subscriptions()]
        writers = [self.reader.get_matched_publication_data(h)
                   for h in self.reader.get_matched_publications()]
        if not readers or not writers:
            return False
        wanted = _ids_of(readers, 'serviceid')
        return not wanted or bool(wanted & _ids_of(writers, 'serviceid'))

    def wait_for_service(self, timeout_s: float) -> bool:
        deadline = time.monotonic() + timeout_s
        while not self.service_is_ready():
            if time.monotonic() >= deadline:
                return False
            time.sleep(_POLL_S)
        return True

    def call(self, request: Any, timeout_s: float) -> Any | None:
        if not isinstance(request, self.srv_type.Request):
            msg = (f'client {self.name}: request is {type(request).__name__}, expected '
                   f'{self.srv_type.ros_type} Request')
            raise TransportError(msg)
        deadline = time.monotonic() + timeout_s
        with self._lock:
            if not self.wait_for_service(timeout_s):
                return None
            self._seq += 1
            seq = self._seq
            dds_raw.take(self.reader, 1000)  # drop stale replies of calls that timed out
            dds_raw.write(self.writer, self.srv_type.request_codec.encode(self.guid & _U64, seq,
                                                                          request))
            while True:
                left = deadline - time.monotonic()
                if left <= 0:
                    return None
                self._waitset.wait(duration(seconds=left))
                for data, info in dds_raw.take(self.reader, 64):
                    if not info.valid_data:
                        continue
                    try:
                        guid, reply_seq, body = self.srv_type.response_codec.decode(data)
                    except TransportError:
                        continue      # an unreadable reply (of this call or another): skip
                    if guid == self.guid & _U64 and reply_seq == seq:
                        return body
