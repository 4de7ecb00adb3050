"""ROS 2 messages <-> CDR bytes (plain XCDR1, as rmw_cyclonedds and rosbag2 store them).

Why this exists: cyclonedds-python's generic (de)serialiser walks the type description
member by member and costs about 50 us for a 6-joint JointState; a controller at 1 kHz cannot
spend that on every sample. Here each message type gets, once, a layout computed from the
field definitions of `rosbags`' type store (the same definitions the DDS structs are generated
from), and runs of fixed-size fields are packed and unpacked with one precompiled
`struct.Struct` each. Field definitions come from rosbags; the encoding rules are those of
XCDR1 (checked byte for byte against rosbags' serialiser in test/unit/test_cdr_codec.py):

* a 4-byte encapsulation header: `00 01 00 00` (little endian) or `00 00 00 00` (big endian);
  decoding honours it, encoding always writes little endian, as every x86/ARM ROS node does;
* every primitive is aligned to its own size (at most 8), measured from the end of the header;
* string = uint32 length including the terminating NUL, the UTF-8 bytes, NUL;
* T[] = uint32 count, then the elements (aligned to the element, only if there is one);
  T[N] = N elements, no count; nested structs are inlined, no padding of their own.

Because alignment depends on where a run starts, each run keeps one Struct per start phase
(offset mod 8) and byte order, built up front. Values come back as Python objects of the
message classes: lists for sequences and arrays, `bytes` for arrays of uint8/char/byte
(like cyclonedds-python), int/float/bool/str for scalars.

Decoding rejects what rosbags rejects (unknown encapsulation, a string without its NUL or of
length 0, invalid UTF-8, counts that cannot fit in the sample, bounds exceeded) by raising
`CdrError`; trailing bytes after the last field are ignored, as DDS readers do (writers pad
samples to 4 bytes). Encoding errors (a value of the wrong type or out of range, a fixed array
of the wrong length, a bound exceeded) also raise `CdrError`, naming the type.
"""
from __future__ import annotations

import struct
from collections.abc import Callable, Mapping
from operator import attrgetter
from typing import Any

from constraint_ctrl.errors import TransportError

#: ROS primitive type -> (struct format character, size = alignment in bytes).
PRIMITIVES: dict[str, tuple[str, int]] = {
    'bool': ('?', 1), 'byte': ('B', 1), 'char': ('B', 1), 'uint8': ('B', 1), 'int8': ('b', 1),
    'uint16': ('H', 2), 'int16': ('h', 2), 'uint32': ('I', 4), 'int32': ('i', 4),
    'uint64': ('Q', 8), 'int64': ('q', 8), 'float32': ('f', 4), 'float64': ('d', 8),
}
#: One-byte types whose fixed arrays are read as `bytes`.
OCTETS = frozenset({'byte', 'char', 'uint8'})
HEADER_LE = b'\x00\x01\x00\x00'
_ENDIAN = ('>', '<')          # index: 0 = big endian, 1 = little endian (encapsulation byte 1)
_COUNT = (struct.Struct('>I'), struct.Struct('<I'))
_COUNT_LE = _COUNT[1]
_ZEROS = bytes(8)

# rosbags' Nodetype values (rosbags.interfaces.Nodetype), kept as plain ints here
BASE, NAME, ARRAY, SEQUENCE = 1, 2, 3, 4


class CdrError(TransportError):
    """A sample that cannot be decoded, or a message that cannot be encoded."""


# ------------------------------------------------------------------------ fixed-size runs

class _Leaf:
    """One fixed-size value inside a run: a primitive, an octet array or a numeric array."""

    __slots__ = ('path', 'char', 'size', 'count', 'octets')

    def __init__(self, path: str, char: str, size: int, count: int, octets: bool) -> None:
        self.path, self.char, self.size, self.count, self.octets = path, char, size, count, octets


class _Run:
    """Consecutive fixed-size fields (primitives, fixed arrays of primitives, nested structs
    made only of those), packed/unpacked with one Struct per start phase and byte order.

    `shape` rebuilds the values: a list of (name, kind, arg) with kind 0 = scalar, 1 = numeric
    array of `arg` values (-> list), 2 = nested struct (arg = (cls, shape)), 3 = octets.
    """

    def __init__(self, leaves: list[_Leaf], shape: list[tuple[str, int, Any]]) -> None:
        self.leaves = leaves
        self.shape = shape
        self.structs = [[self._struct(e, phase) for phase in range(8)] for e in (0, 1)]
        self.simple = all(leaf.count == 1 or leaf.octets for leaf in leaves)
        self.checks = [(i, leaf) for i, leaf in enumerate(leaves) if leaf.octets]
        self.get = attrgetter(*[leaf.path for leaf in leaves]) if leaves else None
        self.single = len(leaves) == 1
        self.flat_shape = all(kind == 0 for _, kind, _ in shape)
        self.names = [name for name, _, _ in shape]

    def _struct(self, e: int, phase: int) -> struct.Struct:
        fmt = [_ENDIAN[e]]
        offset = phase
        for leaf in self.leaves:
            pad = -offset % leaf.size
            if pad:
                fmt.append(f'{pad}x')
            offset += pad
            if leaf.octets:
                fmt.append(f'{leaf.count}s')
            else:
                fmt.append(f'{leaf.count}{leaf.char}' if leaf.count != 1 else leaf.char)
            offset += leaf.size * leaf.count
        return struct.Struct(''.join(fmt))

    def decode(self, body: bytes, pos: int, e: int, out: dict[str, Any]) -> int:
        s = self.structs[e][pos & 7]
        values = s.unpack_from(body, pos)
        if self.flat_shape:
            out.update(zip(self.names, values, strict=True))
        else:
            _build(self.shape, values, 0, out)
        return pos + s.size

    def encode(self, buf: bytearray, obj: Any) -> None:
        s = self.structs[1][(len(buf) - 4) & 7]
        values = self.get(obj)
        if self.single:
            values = (values,)
        if not self.simple or self.checks:
            values = self._flatten(values)
        buf += s.pack(*values)

    def _flatten(self, values: tuple[Any, ...]) -> list[Any]:
        flat: list[Any] = []
        for leaf, value in zip(self.leaves, values, strict=True):
            if leaf.octets:
                value = bytes(value)
                if len(value) != leaf.count:
                    msg = f'{leaf.path}: {len(value)} bytes, the array holds {leaf.count}'
                    raise ValueError(msg)
                flat.append(value)
            elif leaf.count != 1:
                if len(value) != leaf.count:
                    msg = f'{leaf.path}: {len(value)} values, the array holds {leaf.count}'
                    raise ValueError(msg)
                flat.extend(value)
            else:
                flat.append(value)
        return flat


def _build(shape: list[tuple[str, int, Any]], values: tuple[Any, ...], i: int,
           out: dict[str, Any]) -> int:
    for name, kind, arg in shape:
        if kind == 0 or kind == 3:
            out[name] = values[i]
            i += 1
        elif kind == 1:
            out[name] = list(values[i:i + arg])
            i += arg
        else:
            cls, sub = arg
            fields: dict[str, Any] = {}
            i = _build(sub, values, i, fields)
            obj = cls.__new__(cls)
            obj.__dict__ = fields
            out[name] = obj
    return i


# ------------------------------------------------------------------------ variable-size parts

def _align(pos: int, n: int) -> int:
    return pos + (-pos % n)


def _read_count(body: bytes, pos: int, e: int, minimum: int, bound: int,
                what: str) -> tuple[int, int]:
    pos += -pos % 4
    (n,) = _COUNT[e].unpack_from(body, pos)
    pos += 4
    if n * minimum > len(body) - pos:
        msg = f'{what}: count {n} cannot fit in the {len(body) - pos} bytes left'
        raise CdrError(msg)
    if bound and n > bound:
        msg = f'{what}: {n} elements, the bound is {bound}'
        raise CdrError(msg)
    return n, pos


def _read_string(body: bytes, pos: int, e: int, bound: int, what: str) -> tuple[str, int]:
    pos += -pos % 4
    (n,) = _COUNT[e].unpack_from(body, pos)
    pos += 4
    end = pos + n
    if n < 1 or end > len(body):
        msg = f'{what}: invalid string length {n}'
        raise CdrError(msg)
    if body[end - 1] != 0:
        msg = f'{what}: string without its terminating NUL'
        raise CdrError(msg)
    if bound and n - 1 > bound:
        msg = f'{what}: string of {n - 1} bytes, the bound is {bound}'
        raise CdrError(msg)
    return body[pos:end - 1].decode('utf-8'), end


def _write_string(buf: bytearray, text: str, bound: int, what: str) -> None:
    data = text.encode('utf-8')
    if bound and len(data) > bound:
        msg = f'{what}: string of {len(data)} bytes, the bound is {bound}'
        raise ValueError(msg)
    pad = -(len(buf) - 4) % 4
    if pad:
        buf += _ZEROS[:pad]
    buf += _COUNT_LE.pack(len(data) + 1)
    buf += data
    buf += b'\x00'


class _String:
    def __init__(self, name: str, bound: int) -> None:
        self.name, self.bound = name, bound

    def decode(self, body: bytes, pos: int, e: int, out: dict[str, Any]) -> int:
        pos += -pos & 3
        (n,) = _COUNT[e].unpack_from(body, pos)
        start = pos + 4
        end = start + n
        if n < 1 or end > len(body) or body[end - 1] or (self.bound and n - 1 > self.bound):
            _read_string(body, pos, e, self.bound, self.name)      # raises, says why
        out[self.name] = body[start:end - 1].decode('utf-8')
        return end

    def encode(self, buf: bytearray, obj: Any) -> None:
        _write_string(buf, getattr(obj, self.name), self.bound, self.name)


class _Nested:
    """A nested struct field with variable-size parts."""

    def __init__(self, name: str, codec: StructCodec) -> None:
        self.name, self.codec = name, codec
        self.decode_at = codec.decode_at

    def decode(self, body: bytes, pos: int, e: int, out: dict[str, Any]) -> int:
        out[self.name], pos = self.decode_at(body, pos, e)
        return pos

    def encode(self, buf: bytearray, obj: Any) -> None:
        self.codec.encode_to(buf, getattr(obj, self.name))


class _Primitives:
    """T[] or T[N] of a primitive (not string): one unpack for all elements."""

    def __init__(self, name: str, base: str, length: int, bound: int) -> None:
        self.name, self.length, self.bound = name, length, bound
        self.char, self.size = PRIMITIVES[base]
        self.octets = base in OCTETS
        self.formats = [f'{_ENDIAN[e]}{{}}{self.char}' for e in (0, 1)]
        self.dtype = '<' + _NUMPY[self.char]
        self.structs: list[dict[int, struct.Struct]] = [{}, {}]

    def decode(self, body: bytes, pos: int, e: int, out: dict[str, Any]) -> int:
        if self.length:
            n = self.length
        else:
            pos += -pos & 3
            (n,) = _COUNT[e].unpack_from(body, pos)
            pos += 4
            if self.bound and n > self.bound:
                _read_count(body, pos - 4, e, self.size, self.bound, self.name)   # raises
        if n:
            pos += -pos % self.size
            end = pos + n * self.size
            if end > len(body):
                msg = f'{self.name}: {n} elements do not fit in the sample'
                raise CdrError(msg)
            if self.octets:
                out[self.name] = bytes(body[pos:end]) if self.length else list(body[pos:end])
            else:
                structs = self.structs[e]
                s = structs.get(n)
                if s is None:
                    if len(structs) >= 64:     # keep the cache small: common lengths only
                        structs.clear()
                    s = structs[n] = struct.Struct(self.formats[e].format(n))
                out[self.name] = list(s.unpack_from(body, pos))
            return end
        out[self.name] = []
        return pos

    def encode(self, buf: bytearray, obj: Any) -> None:
        value = getattr(obj, self.name)
        n = len(value)
        if self.length:
            if n != self.length:
                msg = f'{self.name}: {n} values, the array holds {self.length}'
                raise ValueError(msg)
        else:
            if self.bound and n > self.bound:
                msg = f'{self.name}: {n} elements, the bound is {self.bound}'
                raise ValueError(msg)
            pad = -(len(buf) - 4) % 4
            if pad:
                buf += _ZEROS[:pad]
            buf += _COUNT_LE.pack(n)
        if not n:
            return
        pad = -(len(buf) - 4) % self.size
        if pad:
            buf += _ZEROS[:pad]
        if self.octets and isinstance(value, (bytes, bytearray)):
            buf += value
        elif hasattr(value, 'dtype'):              # numpy array: one conversion, no unpacking
            if value.ndim != 1:
                msg = f'{self.name}: a {value.ndim}-d array, a sequence needs 1-d'
                raise ValueError(msg)
            buf += value.astype(self.dtype, copy=False).tobytes()
        else:
            buf += struct.pack(self.formats[1].format(n), *value)


#: struct format character -> numpy dtype kind+size (little endian is prepended).
_NUMPY = {'?': 'b1', 'B': 'u1', 'b': 'i1', 'H': 'u2', 'h': 'i2', 'I': 'u4', 'i': 'i4',
          'Q': 'u8', 'q': 'i8', 'f': 'f4', 'd': 'f8'}


class _Strings:
    """string[] or string[N].

    Lists of names (joint names above all) rarely change from one sample to the next, so the
    last list read and the last list written are kept with their bytes: a sample whose bytes
    at this place are the same (one memory comparison) gets a copy of the last list, and an
    equal list is written as the kept bytes. The bytes are a function of the list alone,
    since the count is always 4-aligned (and the byte order is part of the key).
    """

    def __init__(self, name: str, length: int, bound: int, str_bound: int) -> None:
        self.name, self.length, self.bound, self.str_bound = name, length, bound, str_bound
        self._read: tuple[int, bytes, list[str]] | None = None
        self._written: tuple[list[str], bytes] | None = None

    def decode(self, body: bytes, pos: int, e: int, out: dict[str, Any]) -> int:
        pos += -pos & 3
        last = self._read
        if last is not None and last[0] == e and body.startswith(last[1], pos):
            out[self.name] = last[2].copy()
            return pos + len(last[1])
        start = pos
        if self.length:
            n = self.length
        else:
            n, pos = _read_count(body, pos, e, 5, self.bound, self.name)
        unpack = _COUNT[e].unpack_from
        size = len(body)
        str_bound = self.str_bound
        values: list[str] = []
        append = values.append
        for _ in range(n):
            pos += -pos & 3
            (k,) = unpack(body, pos)
            pos += 4
            end = pos + k
            if k < 1 or end > size or body[end - 1] or (str_bound and k - 1 > str_bound):
                _read_string(body, pos - 4, e, str_bound, self.name)   # raises, says why
            append(body[pos:end - 1].decode('utf-8'))
            pos = end
        self._read = (e, body[start:pos], values.copy())
        out[self.name] = values
        return pos

    def encode(self, buf: bytearray, obj: Any) -> None:
        values = getattr(obj, self.name)
        pad = -(len(buf) - 4) & 3
        if pad:
            buf += _ZEROS[:pad]
        last = self._written
        if last is not None and type(values) is list and values == last[0]:
            buf += last[1]
            return
        start = len(buf)
        _write_count(buf, len(values), self.length, self.bound, self.name)
        for text in values:
            _write_string(buf, text, self.str_bound, self.name)
        self._written = (list(values), bytes(buf[start:]))


def _write_count(buf: bytearray, n: int, length: int, bound: int, what: str) -> None:
    if length:
        if n != length:
            msg = f'{what}: {n} values, the array holds {length}'
            raise ValueError(msg)
        return
    if bound and n > bound:
        msg = f'{what}: {n} elements, the bound is {bound}'
        raise ValueError(msg)
    pad = -(len(buf) - 4) % 4
    if pad:
        buf += _ZEROS[:pad]
    buf += _COUNT_LE.pack(n)


class _Structs:
    """Msg[] or Msg[N]."""

    def __init__(self, name: str, codec: StructCodec, length: int, bound: int) -> None:
        self.name, self.codec, self.length, self.bound = name, codec, length, bound

    def decode(self, body: bytes, pos: int, e: int, out: dict[str, Any]) -> int:
        if self.length:
            n = self.length
        else:
            n, pos = _read_count(body, pos, e, 1, self.bound, self.name)
        decode = self.codec.decode_at
        values = []
        for _ in range(n):
            value, pos = decode(body, pos, e)
            values.append(value)
        out[self.name] = values
        return pos

    def encode(self, buf: bytearray, obj: Any) -> None:
        values = getattr(obj, self.name)
        _write_count(buf, len(values), self.length, self.bound, self.name)
        encode = self.codec.encode_to
        for value in values:
            encode(buf, value)


# ------------------------------------------------------------------------ struct codecs

class StructCodec:
    """Encoder/decoder of one message type (see the module docstring)."""

    def __init__(self, ros_type: str, cls: type) -> None:
        self.ros_type = ros_type
        self.cls = cls
        self.parts: list[Any] = []
        self.decoders: list[Callable[[bytes, int, int, dict[str, Any]], int]] = []
        self.encoders: list[Callable[[bytearray, Any], None]] = []

    def add(self, part: Any) -> None:
        self.parts.append(part)
        self.decoders.append(part.decode)
        self.encoders.append(part.encode)

    # whole samples ------------------------------------------------------------------------
    def encode(self, msg: Any) -> bytes:
        """CDR bytes with the little-endian encapsulation header, not padded."""
        buf = bytearray(HEADER_LE)
        try:
            self.encode_to(buf, msg)
        except (struct.error, ValueError, TypeError, AttributeError, OverflowError,
                UnicodeEncodeError) as exc:
            msg_text = f'cannot encode {self.ros_type}: {exc}'
            raise CdrError(msg_text) from exc
        return bytes(buf)

    def decode(self, data: bytes) -> Any:
        """A message from CDR bytes with their encapsulation header (either byte order)."""
        if len(data) < 4 or data[0] or data[1] > 1:
            _encapsulation(data, self.ros_type)                     # raises, says why
        e = data[1]
        body = data[4:] if isinstance(data, bytes) else bytes(data[4:])
        try:
            msg, _ = self.decode_at(body, 0, e)
        except CdrError as exc:
            text = f'cannot decode {self.ros_type}: {exc}'
            raise CdrError(text) from exc
        except (struct.error, UnicodeDecodeError, ValueError, IndexError) as exc:
            text = f'cannot decode {self.ros_type}: {exc}'
            raise CdrError(text) from exc
        return msg

    # parts ---------------------------------------------------------------------------------
    def decode_at(self, body: bytes, pos: int, e: int) -> tuple[Any, int]:
        values: dict[str, Any] = {}
        for decode in self.decoders:
            pos = decode(body, pos, e, values)
        obj = self.cls.__new__(self.cls)
        obj.__dict__ = values
        return obj, pos

    def encode_to(self, buf: bytearray, obj: Any) -> None:
        if not isinstance(obj, self.cls):
            msg = f'expected {self.ros_type}, got {type(obj).__name__}'
            raise TypeError(msg)
        for encode in self.encoders:
            encode(buf, obj)


def _encapsulation(data: bytes, ros_type: str) -> int:
    if len(data) < 4 or data[0] != 0 or data[1] > 1:
        head = bytes(data[:4]).hex(' ')
        msg = f'cannot decode {ros_type}: encapsulation {head!r} is not plain CDR (XCDR1)'
        raise CdrError(msg)
    return data[1]


class ServiceCodec:
    """Service samples as rmw_cyclonedds frames them: `{uint64 guid; int64 seq}` + body.

    The header is 16 bytes, a multiple of every alignment, so the body's layout is that of
    the plain struct (ros2-interop.md section 2.1).
    """

    _HEAD = (struct.Struct('>Qq'), struct.Struct('<Qq'))

    def __init__(self, body: StructCodec) -> None:
        self.body = body

    def encode(self, guid: int, seq: int, msg: Any) -> bytes:
        buf = bytearray(HEADER_LE)
        try:
            buf += self._HEAD[1].pack(guid, seq)
            self.body.encode_to(buf, msg)
        except (struct.error, ValueError, TypeError, AttributeError, OverflowError,
                UnicodeEncodeError) as exc:
            text = f'cannot encode {self.body.ros_type}: {exc}'
            raise CdrError(text) from exc
        return bytes(buf)

    def decode(self, data: bytes) -> tuple[int, int, Any]:
        """(guid, seq, message)."""
        e = _encapsulation(data, self.body.ros_type)
        body = data[4:] if isinstance(data, bytes) else bytes(data[4:])
        try:
            guid, seq = self._HEAD[e].unpack_from(body, 0)
            msg, _ = self.body.decode_at(body, 16, e)
        except CdrError as exc:
            text = f'cannot decode {self.body.ros_type}: {exc}'
            raise CdrError(text) from exc
        except (struct.error, UnicodeDecodeError, ValueError, IndexError) as exc:
            text = f'cannot decode {self.body.ros_type}: {exc}'
            raise CdrError(text) from exc
        return guid, seq, msg


# ------------------------------------------------------------------------ building layouts

FieldDefs = Mapping[str, tuple[list[Any], list[tuple[str, Any]]]]


def build_codecs(fielddefs: FieldDefs, classes: Mapping[str, type],
                 field_name: Callable[[str], str] = lambda name: name) -> dict[str, StructCodec]:
    """One StructCodec per type in `classes`, from rosbags-style field definitions
    (`Typestore.fielddefs`: {type: (constants, [(name, (nodetype, detail)), ...])}).

    An empty field list gets the member `uint8 structure_needs_at_least_one_member`, as the
    ROS IDL generator emits for empty messages.
    """
    codecs = {name: StructCodec(name, cls) for name, cls in classes.items()}
    fixed: dict[str, tuple[list[_Leaf], list[tuple[str, int, Any]]] | None] = {}

    def fields_of(type_name: str) -> list[tuple[str, Any]]:
        fields = list(fielddefs[type_name][1])
        return fields or [('structure_needs_at_least_one_member', (BASE, ('uint8', 0)))]

    def fixed_layout(type_name: str) -> tuple[list[_Leaf], list[tuple[str, int, Any]]] | None:
        """Leaves and shape if every field of the type has a fixed size, else None."""
        if type_name in fixed:
            return fixed[type_name]
        leaves: list[_Leaf] = []
        shape: list[tuple[str, int, Any]] = []
        for raw_name, desc in fields_of(type_name):
            name = field_name(raw_name)
            part = _fixed_field(name, desc)
            if part is None:
                fixed[type_name] = None
                return None
            leaves.extend(part[0])
            shape.append(part[1])
        fixed[type_name] = (leaves, shape)
        return fixed[type_name]

    def _fixed_field(name: str, desc: Any) -> tuple[list[_Leaf], tuple[str, int, Any]] | None:
        kind, detail = desc
        if kind == BASE and detail[0] in PRIMITIVES:
            char, size = PRIMITIVES[detail[0]]
            return [_Leaf(name, char, size, 1, False)], (name, 0, None)
        if kind == ARRAY and detail[0][0] == BASE and detail[0][1][0] in PRIMITIVES:
            base, n = detail[0][1][0], detail[1]
            char, size = PRIMITIVES[base]
            octets = base in OCTETS
            return [_Leaf(name, char, size, n, octets)], (name, 3 if octets else 1, n)
        if kind == NAME:
            sub = fixed_layout(detail)
            if sub is None:
                return None
            leaves = [_Leaf(f'{name}.{leaf.path}', leaf.char, leaf.size, leaf.count,
                            leaf.octets) for leaf in sub[0]]
            return leaves, (name, 2, (classes[detail], sub[1]))
        return None

    for type_name, codec in codecs.items():
        run_leaves: list[_Leaf] = []
        run_shape: list[tuple[str, int, Any]] = []
        for raw_name, desc in fields_of(type_name):
            name = field_name(raw_name)
            part = _fixed_field(name, desc)
            if part is not None:
                run_leaves.extend(part[0])
                run_shape.append(part[1])
                continue
            if run_leaves:
                codec.add(_Run(run_leaves, run_shape))
                run_leaves, run_shape = [], []
            codec.add(_variable_field(name, desc, codecs))
        if run_leaves:
            codec.add(_Run(run_leaves, run_shape))
    return codecs


def _variable_field(name: str, desc: Any, codecs: Mapping[str, StructCodec]) -> Any:
    kind, detail = desc
    if kind == BASE:
        if detail[0] == 'string':
            return _String(name, detail[1])
        msg = f'field {name}: type {detail[0]} is not supported'
        raise TransportError(msg)
    if kind == NAME:
        return _Nested(name, codecs[detail])
    (sub_kind, sub_detail), size = detail
    length, bound = (size, 0) if kind == ARRAY else (0, size)
    if sub_kind == NAME:
        return _Structs(name, codecs[sub_detail], length, bound)
    if sub_detail[0] == 'string':
        return _Strings(name, length, bound, sub_detail[1])
    if sub_detail[0] in PRIMITIVES:
        return _Primitives(name, sub_detail[0], length, bound)
    msg = f'field {name}: type {sub_detail[0]} is not supported'
    raise TransportError(msg)
