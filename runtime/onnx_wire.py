"""Reading the names and external tensors of an ONNX ModelProto with the protocol-buffers wire format.

Stdlib only, so the device runtime can check a bundle's graph without the onnx package; raises
ValueError (or UnicodeDecodeError) on malformed bytes. tests/test_hostile_bundles.py checks it
against onnx's own parser.
"""

from __future__ import annotations

from dataclasses import dataclass

# Field numbers from onnx.proto: ModelProto.graph = 7; GraphProto.node = 1, initializer = 5, input = 11,
# output = 12; NodeProto.input = 1, output = 2, op_type = 4, domain = 7; TensorProto.dims = 1, data_type = 2, name = 8,
# data_location = 14 (EXTERNAL = 1); ValueInfoProto.name = 1. The string fields listed in _TEXT must be
# UTF-8 (onnxruntime's Python layer fails to decode them otherwise, and prints retries to stdout).
_TEXT = {"model": (2, 3, 4, 6), "opset": (1,), "graph": (2, 10), "node": (1, 2, 3, 4, 6, 7), "attribute": (1, 13, 21),
         "tensor": (8, 12), "value": (1, 3)}


def _varint(buf: memoryview, pos: int) -> tuple[int, int]:
    if pos < len(buf) and buf[pos] < 0x80:  # one byte: field keys, lengths and dims below 128
        return buf[pos], pos + 1
    value = 0
    for shift in range(0, 70, 7):
        if pos >= len(buf):
            raise ValueError("truncated varint")
        byte = buf[pos]
        pos += 1
        value |= (byte & 0x7F) << shift
        if byte < 0x80:
            return value, pos
    raise ValueError("varint longer than 10 bytes")


def _fields(buf: memoryview):
    """(field number, wire type, value) of each field of one protobuf message; raises ValueError if malformed."""
    pos = 0
    while pos < len(buf):
        key, pos = _varint(buf, pos)
        number, wire = key >> 3, key & 7
        if number == 0:
            raise ValueError("field number 0")
        if wire == 0:
            value, pos = _varint(buf, pos)
        elif wire in (1, 5):
            size = 8 if wire == 1 else 4
            value, pos = buf[pos : pos + size], pos + size
        elif wire == 2:
            size, pos = _varint(buf, pos)
            value, pos = buf[pos : pos + size], pos + size
        else:
            raise ValueError(f"wire type {wire}")
        if pos > len(buf):
            raise ValueError("field runs past the end of its message")
        yield number, wire, value


def _text(value: object) -> str:
    if not isinstance(value, memoryview):
        raise ValueError("a name is not a length-delimited field")
    return bytes(value).decode("utf-8")


def _strings(fields: list, kind: str) -> list:
    """The fields of one message, after checking its string fields are UTF-8."""
    for number, _, value in fields:
        if number in _TEXT[kind]:
            _text(value)
    return fields


@dataclass(frozen=True)
class GraphNames:
    """What a bundle's reader needs to know of an ONNX graph, read without the onnx package."""

    used: list[str]  # every node input, in node order
    defined: set[str]  # node outputs, initializers and graph inputs
    inputs: set[str]  # graph inputs
    outputs: set[str]  # graph outputs
    external: dict[str, tuple[int, list[int]]]  # external initializers: name -> (data type, dims)
    ops: list[tuple[str, str]]  # (domain, op_type) of every node, in node order ("" is the default domain)


def read_graph_names(graph: bytes) -> GraphNames:
    """The names, external tensors and operators of a serialised ModelProto; raises ValueError if malformed."""
    model = _strings(list(_fields(memoryview(graph))), "model")
    for number, wire, value in model:
        if number == 8 and wire == 2:  # OperatorSetIdProto
            _strings(list(_fields(value)), "opset")
    bodies = [v for n, w, v in model if n == 7 and w == 2]
    if len(bodies) != 1:
        raise ValueError(f"{len(bodies)} graphs in the model, expected 1")
    used: list[str] = []
    defined: set[str] = set()
    inputs: set[str] = set()
    outputs: set[str] = set()
    external: dict[str, tuple[int, list[int]]] = {}
    ops: list[tuple[str, str]] = []
    for number, wire, value in _strings(list(_fields(bodies[0])), "graph"):
        if number == 1 and wire == 2:  # NodeProto
            op_type, domain = "", ""
            for f, w, v in _strings(list(_fields(value)), "node"):
                if f == 1:
                    used.append(_text(v))
                elif f == 2:
                    defined.add(_text(v))
                elif f == 4:
                    op_type = _text(v)
                elif f == 7:
                    domain = _text(v)
                elif f == 5 and w == 2:  # AttributeProto
                    _strings(list(_fields(v)), "attribute")
            ops.append((domain, op_type))
        elif number == 5 and wire == 2:  # TensorProto initializer
            name, dtype, dims, location = "", 0, [], 0
            for f, w, v in _strings(list(_fields(value)), "tensor"):
                if f == 8:
                    name = _text(v)
                elif f == 2 and w == 0:
                    dtype = v
                elif f == 14 and w == 0:
                    location = v
                elif f == 1 and w == 0:
                    dims.append(v)
                elif f == 1 and w == 2:  # packed repeated int64
                    pos = 0
                    while pos < len(v):
                        d, pos = _varint(v, pos)
                        dims.append(d)
            defined.add(name)
            if location == 1:
                external[name] = (dtype, dims)
        elif number in (11, 12) and wire == 2:  # ValueInfoProto graph input / output
            names = [_text(v) for f, w, v in _strings(list(_fields(value)), "value") if f == 1]
            (inputs if number == 11 else outputs).update(names)
    return GraphNames(used, defined | inputs, inputs, outputs, external, ops)


# --- writing ---------------------------------------------------------------------------------------------------
# The few protobuf encodings the graph writer (runtime/graph.py) needs. Fields are written in the order given,
# so equal content gives equal bytes; the reader compares a bundle's graph with these bytes exactly.

def put_varint(value: int) -> bytes:
    """A non-negative integer as a protobuf varint (negative int64 values take 10 bytes, two's complement)."""
    value &= (1 << 64) - 1
    out = bytearray()
    while value >= 0x80:
        out.append((value & 0x7F) | 0x80)
        value >>= 7
    out.append(value)
    return bytes(out)


def put_int(number: int, value: int) -> bytes:
    """A varint field (wire type 0)."""
    return put_varint(number << 3) + put_varint(value)


def put_bytes(number: int, value: bytes | str) -> bytes:
    """A length-delimited field (wire type 2): bytes, a UTF-8 string or an encoded sub-message."""
    data = value.encode("utf-8") if isinstance(value, str) else value
    return put_varint(number << 3 | 2) + put_varint(len(data)) + data
