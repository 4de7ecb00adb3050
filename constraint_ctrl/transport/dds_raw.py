"""Writing and taking serialized samples with cyclonedds-python, without its serialiser.

`DataWriter.write(sample)` and `DataReader.take()` of cyclonedds-python call the type's own
(generic, slow) `serialize`/`deserialize`, and `take()` decodes a whole batch at once, so one
undecodable sample loses the batch and raises. The port instead hands bytes to and from the
same C calls those methods use (`cyclonedds._clayer.ddspy_write` / `ddspy_take`, see
cyclonedds/pub.py and sub.py) and decodes each sample itself with cdr.py: fast, and a bad
sample can be dropped on its own.
"""
from __future__ import annotations

from typing import Any

from cyclonedds._clayer import ddspy_take, ddspy_write
from cyclonedds.core import DDSException, InstanceState, SampleState, ViewState

#: Not-yet-read samples of any view and instance state (what a waitset ReadCondition reports).
NOT_READ = SampleState.NotRead | ViewState.Any | InstanceState.Any
_ANY = SampleState.Any | ViewState.Any | InstanceState.Any


def write(writer: Any, data: bytes) -> None:
    """Write one serialized sample (CDR with its encapsulation header).

    Padded to a multiple of 4 bytes as cyclonedds-python's own write does (DataWriter.write);
    the encapsulation header's option bits stay 0, also as there.
    """
    pad = -len(data) % 4
    ret = ddspy_write(writer._ref, data + bytes(pad) if pad else data)
    if ret < 0:
        msg = f'Occurred while writing sample in {writer!r}'
        raise DDSException(ret, msg)


def take(reader: Any, n: int, mask: int = _ANY) -> list[tuple[bytes, Any]]:
    """Up to n samples as (CDR bytes, SampleInfo); invalid samples (disposals, unregistrations:
    `info.valid_data` false) are included, the caller skips them."""
    ret = ddspy_take(reader._ref, mask, n)
    if isinstance(ret, int):
        msg = f'Occurred while taking data in {reader!r}'
        raise DDSException(ret, msg)
    return ret
