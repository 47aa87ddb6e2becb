"""A small, strict decoder for Universal Binary JSON (UBJSON).

XGBoost saves models as UBJSON (``.ubj``) as well as JSON: the same document,
with numbers in big-endian binary instead of decimal text. This module turns
such bytes into the Python objects ``json.loads`` would give for the JSON
twin, except that *optimized typed arrays* of numbers (``[$d#...``) become
numpy arrays, decoded in one ``np.frombuffer`` call rather than element by
element.

The decoder is bounded so that a corrupt or hostile file fails fast with one
:class:`~treeprobe.errors.ModelFormatError` naming the byte offset: every
count and length is checked against the bytes that remain, nesting is
limited, and trailing bytes are refused.

References
----------
.. [1] Universal Binary JSON Specification, Draft 12, https://ubjson.org
   (type markers, optimized containers with ``$`` type and ``#`` count).
"""

from __future__ import annotations

import struct
from typing import Any

import numpy as np

from ..errors import ModelFormatError

__all__ = ["decode_ubjson", "MAX_NESTING"]

MAX_NESTING = 128

# Fixed-size numeric markers: (big-endian numpy dtype, struct unpacker, byte width).
_NUMERIC = {
    b"i": (np.dtype(">i1"), struct.Struct(">b"), 1),
    b"U": (np.dtype(">u1"), struct.Struct(">B"), 1),
    b"I": (np.dtype(">i2"), struct.Struct(">h"), 2),
    b"l": (np.dtype(">i4"), struct.Struct(">i"), 4),
    b"L": (np.dtype(">i8"), struct.Struct(">q"), 8),
    b"d": (np.dtype(">f4"), struct.Struct(">f"), 4),
    b"D": (np.dtype(">f8"), struct.Struct(">d"), 8),
}
_NATIVE = {mark: spec[0].newbyteorder("=") for mark, spec in _NUMERIC.items()}
_INTEGER_MARKERS = (b"i", b"U", b"I", b"l", b"L")
# Markers whose value is the marker itself; in a typed container they carry no payload.
_CONSTANTS = {b"Z": None, b"T": True, b"F": False}


class _Decoder:
    """Cursor over the bytes; every read checks the bounds first."""

    def __init__(self, data: bytes, source: str, max_nesting: int) -> None:
        self.data = data
        self.size = len(data)
        self.pos = 0
        self.source = source
        self.max_nesting = max_nesting

    def fail(self, message: str, offset: int | None = None) -> ModelFormatError:
        where = self.pos if offset is None else offset
        return ModelFormatError(f"{self.source}: corrupt UBJSON at byte offset {where}: {message}")

    def take(self, n_bytes: int, what: str) -> bytes:
        end = self.pos + n_bytes
        if end > self.size:
            raise self.fail(f"{what} needs {n_bytes} bytes, only {self.size - self.pos} remain (file truncated?)")
        chunk = self.data[self.pos:end]
        self.pos = end
        return chunk

    def marker(self, what: str) -> bytes:
        if self.pos >= self.size:
            raise self.fail(f"file ends where {what} was expected (file truncated?)")
        mark = self.data[self.pos:self.pos + 1]
        self.pos += 1
        return mark

    def number(self, mark: bytes) -> int | float:
        _, unpacker, width = _NUMERIC[mark]
        pos = self.pos
        if pos + width > self.size:
            raise self.fail(f"number of type {mark.decode()!r} needs {width} bytes, "
                            f"only {self.size - pos} remain (file truncated?)")
        self.pos = pos + width
        return unpacker.unpack_from(self.data, pos)[0]

    def count(self, what: str, limit: int | None = None) -> int:
        """A length or count: an integer marker and a non-negative value that fits in the file.

        ``limit`` replaces the remaining byte count as the bound, for counts of
        elements that occupy no bytes.
        """
        start = self.pos
        if start >= self.size:
            raise self.fail(f"file ends where the integer type of a {what} was expected (file truncated?)")
        mark = self.data[start:start + 1]
        self.pos = start + 1
        if mark not in _INTEGER_MARKERS:
            raise self.fail(f"a {what} must be an integer, found marker {mark!r}", start)
        value = int(self.number(mark))
        if value < 0:
            raise self.fail(f"negative {what} {value}", start)
        if limit is not None:
            if value > limit:
                raise self.fail(f"{what} {value} exceeds the limit of {limit} for elements without payload", start)
        elif value > self.size - self.pos:
            raise self.fail(f"{what} {value} is larger than the {self.size - self.pos} bytes that remain", start)
        return value

    def string(self) -> str:
        start = self.pos
        length = self.count("string length")
        # count() has checked that the length fits in the remaining bytes.
        end = self.pos + length
        raw = self.data[self.pos:end]
        self.pos = end
        try:
            return raw.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise self.fail(f"string is not valid UTF-8 ({exc.reason})", start) from None

    def value(self, mark: bytes, depth: int) -> Any:
        """Decode the value introduced by ``mark`` (already consumed)."""
        if mark in _NUMERIC:
            return self.number(mark)
        if mark in _CONSTANTS:
            return _CONSTANTS[mark]
        if mark == b"S":
            return self.string()
        if mark == b"[":
            return self.array(depth + 1)
        if mark == b"{":
            return self.obj(depth + 1)
        if mark == b"C":
            char = self.take(1, "char")
            if char[0] > 127:
                raise self.fail(f"char value {char[0]} is not ASCII", self.pos - 1)
            return char.decode("ascii")
        if mark == b"H":
            start = self.pos
            text = self.string()
            try:
                return int(text) if text.lstrip("+-").isdigit() else float(text)
            except ValueError:
                raise self.fail(f"high-precision number {text[:40]!r} is not a number", start) from None
        raise self.fail(f"unknown type marker {mark!r}", self.pos - 1)

    def container_header(self, depth: int, kind: str) -> tuple[bytes | None, int | None]:
        """Optional ``$type`` and ``#count`` after an opening bracket."""
        if depth > self.max_nesting:
            raise self.fail(f"{kind}s nested deeper than {self.max_nesting} levels", self.pos - 1)
        element_type = None
        count = None
        if self.data[self.pos:self.pos + 1] == b"$":
            self.pos += 1
            element_type = self.marker("the element type of a typed container")
            if element_type == b"N" or (element_type not in _NUMERIC and element_type not in _CONSTANTS
                                        and element_type not in (b"S", b"C", b"H", b"[", b"{")):
                raise self.fail(f"invalid element type {element_type!r} for a typed {kind}", self.pos - 1)
            if self.data[self.pos:self.pos + 1] != b"#":
                raise self.fail(f"typed {kind} lacks its '#' count", self.pos)
        if self.data[self.pos:self.pos + 1] == b"#":
            self.pos += 1
            # Elements without payload (typed null/true/false) take no bytes; the
            # document size still bounds how many are materialised.
            count = self.count("array count" if kind == "array" else "object count",
                               self.size if element_type in _CONSTANTS else None)
        return element_type, count

    def array(self, depth: int) -> Any:
        start = self.pos - 1
        element_type, count = self.container_header(depth, "array")
        if element_type in _NUMERIC:
            dtype, _, width = _NUMERIC[element_type]
            if count * width > self.size - self.pos:
                raise self.fail(
                    f"typed array of {count} x {width}-byte numbers needs {count * width} bytes, "
                    f"only {self.size - self.pos} remain",
                    start,
                )
            out = np.frombuffer(self.data, dtype=dtype, count=count, offset=self.pos)
            self.pos += count * width
            return out.astype(_NATIVE[element_type])
        if element_type in _CONSTANTS:
            return [_CONSTANTS[element_type]] * count
        if element_type is not None:
            return [self.value(element_type, depth) for _ in range(count)]
        items = []
        if count is not None:
            for _ in range(count):
                items.append(self.value(self.next_marker("array element"), depth))
            return items
        while True:
            mark = self.next_marker("array element or ']'")
            if mark == b"]":
                return items
            items.append(self.value(mark, depth))

    def next_marker(self, what: str) -> bytes:
        mark = self.marker(what)
        while mark == b"N":  # no-op padding, allowed between values
            mark = self.marker(what)
        return mark

    def obj(self, depth: int) -> dict:
        element_type, count = self.container_header(depth, "object")
        out: dict[str, Any] = {}

        def member() -> None:
            key = self.string()
            mark = element_type if element_type is not None else self.next_marker("an object value")
            out[key] = self.value(mark, depth)

        if count is not None:
            for _ in range(count):
                if element_type is None:
                    while self.data[self.pos:self.pos + 1] == b"N":
                        self.pos += 1
                member()
            return out
        while True:
            while self.data[self.pos:self.pos + 1] == b"N":
                self.pos += 1
            if self.pos >= self.size:
                raise self.fail("file ends inside an object (file truncated?)")
            if self.data[self.pos:self.pos + 1] == b"}":
                self.pos += 1
                return out
            member()


def decode_ubjson(data: bytes, *, source: str = "<bytes>", max_nesting: int = MAX_NESTING) -> Any:
    """Decode one UBJSON document.

    Parameters
    ----------
    data : bytes
        The whole document.
    source : str, default "<bytes>"
        Where the bytes came from, used in error messages.
    max_nesting : int, default 128
        Deepest allowed nesting of arrays and objects.

    Returns
    -------
    object
        Nested dicts, lists, str, int, float, bool and None as ``json.loads``
        would give, except that optimized typed arrays of numbers are numpy
        arrays in native byte order (``int8`` ... ``int64``, ``uint8``,
        ``float32``, ``float64``).

    Raises
    ------
    ModelFormatError
        For truncated or corrupt bytes, naming the byte offset.

    Notes
    -----
    Follows Draft 12 of the specification [1]_: markers ``Z N T F i U I l L d
    D H C S [ {``, containers with an optional ``$`` element type (which
    requires a ``#`` count) and an optional ``#`` count. Lengths and counts
    must be non-negative and no larger than the bytes that remain (for typed
    containers of null/true/false, whose elements take no bytes: no larger
    than the document), so a corrupt count cannot make the decoder allocate
    far beyond the file size.

    References
    ----------
    .. [1] Universal Binary JSON Specification, Draft 12, https://ubjson.org

    Examples
    --------
    >>> decode_ubjson(b"{i\\x04nameSi\\x03hub}")
    {'name': 'hub'}
    >>> decode_ubjson(b"[$i#i\\x03\\x01\\x02\\x03")
    array([1, 2, 3], dtype=int8)
    """
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise ModelFormatError(f"{source}: UBJSON input must be bytes, got {type(data).__name__}")
    if not isinstance(max_nesting, int) or max_nesting < 1:
        raise ValueError(f"max_nesting must be a positive integer, got {max_nesting!r}")
    decoder = _Decoder(bytes(data), source, max_nesting)
    result = decoder.value(decoder.next_marker("a value"), 0)
    while decoder.pos < decoder.size and decoder.data[decoder.pos:decoder.pos + 1] == b"N":
        decoder.pos += 1
    if decoder.pos != decoder.size:
        raise decoder.fail(f"{decoder.size - decoder.pos} unexpected bytes after the end of the document")
    return result
