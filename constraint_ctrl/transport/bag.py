"""Record serialized messages into a rosbag2 (MCAP storage + metadata.yaml) without ROS.

Writing goes through the PyPI `rosbags` writer on a background thread fed by a bounded queue:
`write()` never blocks the control tick; when the queue is full the message is dropped and
counted in `dropped`. Metadata version 9 is what Jazzy writes; Humble's reader cannot parse
version 9 (its offered_qos_profiles field is a string up to version 8), so distro='humble'
writes version 8. `ros_distro` in the metadata names the distro (rosbags writes its own name
there). Message blobs are full CDR samples with the 4-byte encapsulation header
(port.serialize gives exactly that).

A recorder that fails never takes the caller down. rosbags puts messages on disk one MCAP
chunk (about 1 MiB) at a time; here each chunk goes to the file in one piece, and a chunk that
cannot be written (disk full, file size limit, I/O error) is cut off again, so the file ends
with the last complete chunk. The recorder then stops (`state` 'failed', `error` says why,
`on_failure` is called once) and closes the bag at once: summary and metadata.yaml describe
exactly the messages that are on disk. Messages that did not make it, and every later one,
are counted in `dropped`. A bag folder removed while recording is noticed at the next chunk;
nothing is recreated.
"""
from __future__ import annotations

import io
import os
import queue
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

from rosbags.interfaces import (Qos, QosDurability, QosHistory, QosLiveliness, QosReliability,
                                QosTime)
from rosbags.rosbag2 import StoragePlugin, Writer, WriterError
from rosbags.rosbag2.storage_mcap import McapWriter
from rosbags.typesys import Stores, get_typestore
from ruamel.yaml import YAML

from constraint_ctrl.errors import TransportError
from constraint_ctrl.transport.qos import profile

_VERSIONS = {'jazzy': 9, 'humble': 8}
_STORES = {'jazzy': Stores.ROS2_JAZZY, 'humble': Stores.ROS2_HUMBLE}
_UNSET = QosTime(sec=0, nsec=0)  # deadline/lifespan/lease left at the ROS default
_CLOSE = object()
_PLACEHOLDER = object()          # topic added after the recorder stopped: writes are dropped

RECORDING, FAILED, CLOSED = 'recording', 'failed', 'closed'


def bag_qos(name: str) -> Qos:
    """One of our named profiles as rosbag2's offered QoS record."""
    p = profile(name)
    return Qos(
        history=QosHistory.KEEP_LAST, depth=p.depth,
        reliability=QosReliability.RELIABLE if p.reliable else QosReliability.BEST_EFFORT,
        durability=QosDurability.TRANSIENT_LOCAL if p.transient_local else QosDurability.VOLATILE,
        deadline=_UNSET, lifespan=_UNSET, liveliness=QosLiveliness.AUTOMATIC,
        liveliness_lease_duration=_UNSET, avoid_ros_namespace_conventions=False)


def _yaml() -> YAML:
    yaml = YAML(typ='safe')
    yaml.default_flow_style = False   # as rosbags writes it
    return yaml


def _with_distro(text: str, distro: str) -> str:
    """A metadata YAML text with `ros_distro` set to the distro."""
    yaml = _yaml()
    data = yaml.load(text)
    inner = data.get('rosbag2_bagfile_information', data)
    inner['ros_distro'] = distro
    out = io.StringIO()
    yaml.dump(data, out)
    return out.getvalue()


class _StagedFile:
    """The MCAP file as rosbags' storage writes to it: writes collect in memory and go to the
    file in one piece at commit(). A commit that fails cuts the file back to the end of the
    last complete commit, so a full disk gets the space of the failed piece back."""

    def __init__(self, raw: io.FileIO) -> None:
        self._raw = raw
        self._staged = io.BytesIO()
        self.committed = raw.tell()

    def write(self, data: Any) -> int:
        return self._staged.write(data)

    def tell(self) -> int:
        return self.committed + self._staged.tell()

    def commit(self) -> None:
        data = memoryview(self._staged.getvalue())
        self._staged = io.BytesIO()
        try:
            while data:
                n = self._raw.write(data)
                if not n:
                    raise OSError('the bag file accepted no more data')
                data = data[n:]
        except BaseException:
            os.ftruncate(self._raw.fileno(), self.committed)
            self._raw.seek(self.committed)
            raise
        self.committed = self._raw.tell()

    def unlinked(self) -> bool:
        """True once the file (or its folder) was removed: what is written goes nowhere."""
        return os.fstat(self._raw.fileno()).st_nlink == 0

    def close(self, commit: bool = True) -> None:
        try:
            if commit:
                self.commit()
        finally:
            self._raw.close()


class _McapStorage(McapWriter):
    """rosbags' MCAP storage, each chunk committed whole (see _StagedFile); a chunk that cannot
    be committed is forgotten, with its messages, as if it had never been written."""

    distro = 'jazzy'

    def __init__(self, path: Path, compression: Any) -> None:
        super().__init__(path, compression)
        self.bio.flush()
        self.bio = _StagedFile(self.bio.detach())   # type: ignore[assignment]
        self.commits = 0
        self._saved_times = (self.message_start_time, self.message_end_time)

    def close_chunk(self) -> None:
        pending, chunks = self.chunk, len(self.chunks)
        super().close_chunk()         # into the staging buffer: nothing on disk yet
        try:
            self.bio.commit()
        except BaseException:
            del self.chunks[chunks:]
            for cid, msgs in pending.msgs.items():
                self.channel_stats[cid] -= len(msgs)
            self.message_start_time, self.message_end_time = self._saved_times
            raise
        self.commits += 1
        self._saved_times = (self.message_start_time, self.message_end_time)

    def close(self, version: int, metadata: str) -> None:
        super().close(version, _with_distro(metadata, self.distro).strip())

    def abort(self) -> None:
        self.bio.close(commit=False)


class _Writer(Writer):
    """rosbags' Writer on _McapStorage, naming the distro in metadata.yaml."""

    STORAGE_PLUGINS = {StoragePlugin.MCAP: _McapStorage}  # type: ignore[dict-item]

    def __init__(self, path: Path, *, distro: str) -> None:
        super().__init__(path, version=_VERSIONS[distro],  # type: ignore[arg-type]
                         storage_plugin=StoragePlugin.MCAP)
        self.distro = distro

    def open(self) -> None:
        super().open()
        self.storage.distro = self.distro   # type: ignore[union-attr]

    def write(self, connection: Any, timestamp: int, data: bytes | memoryview) -> None:
        try:
            super().write(connection, timestamp, data)
        except BaseException:
            self._count_what_was_kept()
            raise

    def write_pending(self) -> None:
        """Put the last, incomplete chunk on disk, before close() summarises the bag."""
        storage: Any = self.storage
        if storage is not None and storage.chunk.bio.tell():
            try:
                storage.close_chunk()
            except BaseException:
                self._count_what_was_kept()
                raise

    def _count_what_was_kept(self) -> None:
        """The storage forgot the chunk it could not write: count only what it kept."""
        storage: Any = self.storage
        self.counts = {cid: storage.channel_stats.get(cid, 0) for cid in self.counts}
        self.min_timestamp = storage.message_start_time
        self.max_timestamp = storage.message_end_time

    def close(self) -> None:
        super().close()
        text = _with_distro(self.metapath.read_text('utf8'), self.distro)
        tmp = self.metapath.with_suffix('.yaml.tmp')
        tmp.write_text(text, 'utf8')
        tmp.replace(self.metapath)


class BagRecorder:
    """rosbag2 writer that never blocks its caller and never raises once recording; use as a
    context manager or call close(). `state` is 'recording', 'failed' or 'closed'; `written`
    counts messages in the bag, `dropped` messages given to write() that are not in it."""

    def __init__(self, path: Path, *, distro: str = 'jazzy', queue_size: int = 10_000,
                 on_failure: Callable[[str], None] | None = None) -> None:
        if distro not in _VERSIONS:
            msg = f'bag distro {distro!r} is not supported; use one of {", ".join(_VERSIONS)}'
            raise TransportError(msg)
        self.path = Path(path)
        self.distro = distro
        self.state = RECORDING
        self.error = ''
        self.dropped = 0
        self.written = 0
        self._on_failure = on_failure
        self._typestore = get_typestore(_STORES[distro])
        existed = self.path.exists()
        try:
            self._writer = _Writer(self.path, distro=distro)
            self._writer.open()
        except WriterError as exc:
            msg = f'bag {str(self.path)!r}: {exc} (the directory must not exist yet)'
            raise TransportError(msg) from None
        except OSError as exc:
            if not existed and self.path.is_dir() and not any(self.path.iterdir()):
                self.path.rmdir()
            msg = (f'cannot create the bag folder {str(self.path)!r}: '
                   f'{exc.strerror or exc}' + (f': {exc.filename!r}' if exc.filename else ''))
            raise TransportError(msg) from None
        self._connections: dict[str, Any] = {}
        self._lock = threading.Lock()          # the writer: add_topic vs the writer thread
        self._count_lock = threading.Lock()    # dropped: tick threads vs the writer thread
        self._queue: queue.Queue[Any] = queue.Queue(maxsize=queue_size)
        self._closing = False
        self._commits = 0
        self._thread = threading.Thread(target=self._run, name='bag-writer', daemon=True)
        self._thread.start()

    def add_topic(self, topic: str, ros_type: str, qos: str) -> None:
        """Register a topic before writing to it; ros_type like 'sensor_msgs/msg/JointState'."""
        if ros_type not in self._typestore.types:
            msg = (f'bag topic {topic}: type {ros_type!r} is unknown to the rosbags type store; '
                   "use a standard type name like 'sensor_msgs/msg/JointState'")
            raise TransportError(msg)
        with self._lock:
            if topic in self._connections:
                msg = f'bag topic {topic} was added twice'
                raise TransportError(msg)
            if self.state != RECORDING:
                self._connections[topic] = _PLACEHOLDER
                return
            self._connections[topic] = self._writer.add_connection(
                topic, ros_type, typestore=self._typestore, offered_qos_profiles=[bag_qos(qos)])

    def write(self, topic: str, stamp_ns: int, cdr: bytes) -> bool:
        """Queue one message; False (and `dropped` += 1) when the queue is full or the
        recorder has stopped. Raises only for a topic that was never added."""
        connection = self._connections.get(topic)
        if connection is None:
            msg = f'bag topic {topic} was not added (call add_topic first)'
            raise TransportError(msg)
        if self.state != RECORDING or self._closing:
            self._drop(1)
            return False
        try:
            self._queue.put_nowait((connection, stamp_ns, cdr))
        except queue.Full:
            self._drop(1)
            return False
        return True

    def _drop(self, n: int) -> None:
        with self._count_lock:
            self.dropped += n

    def _run(self) -> None:
        storage = self._writer.storage
        while True:
            item = self._queue.get()
            if item is _CLOSE:
                break
            connection, stamp_ns, cdr = item
            if self.state != RECORDING or connection is _PLACEHOLDER:
                self._drop(1)
                continue
            try:
                with self._lock:
                    self._writer.write(connection, stamp_ns, cdr)
            except Exception as exc:  # noqa: BLE001 - any storage failure stops the recorder
                self._write_failed(exc, 1)
                continue
            self.written += 1
            if storage.commits != self._commits:      # a chunk reached the disk
                self._commits = storage.commits
                if storage.bio.unlinked():
                    self._fail('the bag folder was removed', keep=False)
        if self.state != RECORDING:
            return
        try:
            with self._lock:
                self._writer.write_pending()
        except Exception as exc:  # noqa: BLE001 - the last chunk failed: close without it
            self._write_failed(exc, 0)
            return
        if storage.bio.unlinked():
            self._fail('the bag folder was removed', keep=False)
            return
        with self._lock:
            self._finish()

    def _write_failed(self, exc: Exception, failed: int) -> None:
        """The writer kept fewer messages than it was given (+ `failed` it refused)."""
        kept = sum(self._writer.counts.values())
        self._drop(self.written + failed - kept)
        self.written = kept
        self._fail(f'writing failed: {exc}')

    def _fail(self, reason: str, *, keep: bool = True) -> None:
        """Stop recording; close the bag with what is on disk (keep) or give it up."""
        self.error = f'bag {self.path}: recording stopped: {reason}'   # before the state
        self.state = FAILED
        with self._lock:
            if keep:
                self._finish(reason)
            else:
                self._abandon(reason)

    def _finish(self, reason: str = '') -> None:
        """Close the bag (summary + metadata.yaml); a failure here is reported, not raised."""
        try:
            self._writer.close()
        except Exception as exc:  # noqa: BLE001 - reported through state/error/on_failure
            self._abandon((f'{reason}; ' if reason else '') + f'closing the bag failed: {exc}')
            return
        if reason:
            self._report(f'recording stopped: {reason}; the bag keeps the first '
                         f'{self.written} messages and is closed')
        else:
            self.state = CLOSED

    def _abandon(self, reason: str) -> None:
        """Give the bag up: its folder is gone or it cannot be closed (no metadata.yaml)."""
        self.state = FAILED
        try:
            self._writer.abort()
        except Exception:  # noqa: BLE001,S110 - already failed; the reason is reported
            pass
        self._drop(self.written)
        self.written = 0
        self._report(f'recording stopped: {reason}; the bag is incomplete')

    def _report(self, reason: str) -> None:
        self.error = f'bag {self.path}: {reason}'
        if self._on_failure is not None:
            self._on_failure(self.error)

    def close(self) -> None:
        """Write what is queued, then close the bag; failures go to state/error/on_failure."""
        if self._closing:
            return
        self._closing = True
        while self._thread.is_alive():
            try:
                self._queue.put(_CLOSE, timeout=0.1)
                break
            except queue.Full:
                continue
        self._thread.join()

    def __enter__(self) -> BagRecorder:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
