"""How much memory a Parquet file will take once decoded, known before anything is decoded.

A Parquet footer states *encoded* sizes; dictionary and RLE/bit-packed pages decode to far
more (a 51 KiB file can declare gigabytes). So before pyarrow sees a golden file, this module
reads, in pure Python and from bytes already in memory:

- the footer (`FileMetaData`, Thrift compact protocol; Apache Parquet spec, parquet.thrift),
  because pyarrow's own per-column accessors can abort the process on a damaged footer;
- every page header of every column chunk, because only page headers say how many values
  (leaf slots, including those of list columns) a page decodes to.

From them it computes an upper bound of the decoded size of every column chunk and refuses
a file above the limits the caller derives from `trainguard_max_file_mib`. Nothing here
allocates more than a small multiple of the footer and header bytes, and every loop is
bounded by the bytes it walks over.

Thrift compact protocol, as used by Parquet (Apache Thrift, "Thrift Compact protocol
encoding", doc/specs/thrift-compact-protocol.md): a field header byte holds the field-id
delta (high nibble; 0 = a zigzag i16 id follows) and the type (low nibble); integers are
zigzag varints; binary is a varint length then bytes; a list header holds the size (high
nibble; 15 = a varint size follows) and the element type.
"""

from __future__ import annotations

import struct
from dataclasses import dataclass, field

MAGIC = b"PAR1"
_T_STOP, _T_TRUE, _T_FALSE, _T_BYTE, _T_I16, _T_I32, _T_I64, _T_DOUBLE, _T_BINARY, _T_LIST, _T_SET, _T_MAP, \
    _T_STRUCT, _T_UUID = range(14)
#: Nesting deeper than this is not Parquet's (FileMetaData nests about 6 levels).
_MAX_DEPTH = 24

#: Parquet physical types (parquet.thrift `Type`) and codecs pyarrow can write.
PHYSICAL_INT64, PHYSICAL_DOUBLE, PHYSICAL_BYTE_ARRAY = 2, 5, 6
_CODECS = {0: "UNCOMPRESSED", 1: "SNAPPY", 2: "GZIP", 4: "BROTLI", 6: "ZSTD", 7: "LZ4_RAW"}
_PAGE_DATA, _PAGE_INDEX, _PAGE_DICT, _PAGE_DATA_V2 = 0, 1, 2, 3


class BoundsError(ValueError):
    """The file is malformed (the message says how)."""


class OverLimitError(BoundsError):
    """The file is well formed but would decode to more than the limits allow."""


#: Which fields of a struct to build: {field id: spec of the nested struct, or None for the whole value}.
Spec = "dict[int, Spec] | None"

#: parquet.thrift fields measure() reads; everything else (schema, statistics, indexes) is skipped.
_COLUMN_META: dict[int, Spec] = {1: None, 3: None, 4: None, 5: None, 7: None, 9: None, 11: None}
_FOOTER: dict[int, Spec] = {2: {}, 3: None, 4: {1: {1: None, 3: _COLUMN_META}, 3: None}}
_PAGE_HEADER: dict[int, Spec] = {1: None, 2: None, 3: None, 5: {1: None}, 7: {1: None}, 8: {1: None}}


class _Reader:
    """A Thrift compact-protocol reader over a bytes object; every read checks the end."""

    __slots__ = ("buf", "pos", "end")

    def __init__(self, buf: bytes, pos: int = 0, end: int | None = None) -> None:
        self.buf, self.pos, self.end = buf, pos, len(buf) if end is None else end

    def byte(self) -> int:
        if self.pos >= self.end:
            raise BoundsError("Thrift data ends early")
        b = self.buf[self.pos]
        self.pos += 1
        return b

    def varint(self) -> int:
        buf, pos, end = self.buf, self.pos, self.end
        shift = result = 0
        while True:
            if pos >= end:
                raise BoundsError("Thrift data ends early")
            b = buf[pos]
            pos += 1
            result |= (b & 0x7F) << shift
            if b < 0x80:
                self.pos = pos
                return result
            shift += 7
            if shift > 63:
                raise BoundsError("Thrift varint longer than 64 bits")

    def zigzag(self) -> int:
        n = self.varint()
        return (n >> 1) ^ -(n & 1)

    def take(self, n: int) -> bytes:
        if n < 0 or self.pos + n > self.end:
            raise BoundsError("Thrift field runs past its data")
        out = self.buf[self.pos:self.pos + n]
        self.pos += n
        return out

    def value(self, t: int, depth: int) -> object:
        if t in (_T_TRUE, _T_FALSE):
            return t == _T_TRUE
        if t == _T_BYTE:
            return self.byte()
        if t in (_T_I16, _T_I32, _T_I64):
            return self.zigzag()
        if t == _T_DOUBLE:
            return struct.unpack("<d", self.take(8))[0]
        if t == _T_BINARY:
            return self.take(self.varint())
        if t == _T_UUID:
            return self.take(16)
        if t in (_T_LIST, _T_SET):
            size, et = self.list_header()
            if et in (_T_TRUE, _T_FALSE):  # booleans in lists are one byte each
                return [self.byte() == 1 for _ in range(size)]
            return [self.value(et, depth + 1) for _ in range(size)]
        if t == _T_MAP:
            size = self.varint()
            if size == 0:
                return {}
            types = self.byte()
            if 2 * size > self.end - self.pos:
                raise BoundsError("Thrift map longer than its data")
            return {self._key(self.value(types >> 4, depth + 1)): self.value(types & 0x0F, depth + 1)
                    for _ in range(size)}
        if t == _T_STRUCT:
            return self.struct(depth + 1)
        raise BoundsError(f"unknown Thrift type {t}")

    @staticmethod
    def _key(k: object) -> object:
        return k if isinstance(k, (int, bytes, bool, float)) else repr(k)

    def struct(self, depth: int = 0, keep: Spec = None) -> dict[int, object]:
        """One struct as {field id: value}. With `keep` ({field id: nested keep, or None for all}),
        other fields are skipped without building objects (footers carry statistics we never need)."""
        if depth > _MAX_DEPTH:
            raise BoundsError("Thrift structs nested too deeply")
        out: dict[int, object] = {}
        last = 0
        while True:
            head = self.byte()
            t = head & 0x0F
            if t == _T_STOP:
                return out
            delta = head >> 4
            fid = last + delta if delta else self.zigzag()
            last = fid
            if keep is None:
                out[fid] = self.value(t, depth)
            elif fid in keep:
                sub = keep[fid]
                if sub is not None and t == _T_STRUCT:
                    out[fid] = self.struct(depth + 1, sub)
                elif sub is not None and t in (_T_LIST, _T_SET):
                    out[fid] = self._struct_list(depth, sub)
                else:
                    out[fid] = self.value(t, depth)
            else:
                self.skip(t, depth)

    def list_header(self) -> tuple[int, int]:
        """(size, element type) of a list or set; every element takes at least one byte."""
        head = self.byte()
        size, et = head >> 4, head & 0x0F
        if size == 15:
            size = self.varint()
        if size > self.end - self.pos:
            raise BoundsError("Thrift list longer than its data")
        return size, et

    def _struct_list(self, depth: int, keep: Spec) -> list[object]:
        size, et = self.list_header()
        if et != _T_STRUCT:
            raise BoundsError("Thrift list of the wrong element type")
        return [self.struct(depth + 2, keep) for _ in range(size)]

    def skip(self, t: int, depth: int) -> None:
        """Step over one value of type `t` without building it."""
        if depth > _MAX_DEPTH:
            raise BoundsError("Thrift structs nested too deeply")
        if t in (_T_I16, _T_I32, _T_I64):
            self.varint()
        elif t in (_T_TRUE, _T_FALSE):
            return
        elif t == _T_BYTE:
            self.byte()
        elif t == _T_DOUBLE:
            self.take(8)
        elif t == _T_BINARY:
            n = self.varint()
            if n < 0 or self.pos + n > self.end:
                raise BoundsError("Thrift field runs past its data")
            self.pos += n
        elif t == _T_UUID:
            self.take(16)
        elif t in (_T_LIST, _T_SET):
            size, et = self.list_header()
            if et in (_T_TRUE, _T_FALSE):
                self.take(size)
            else:
                for _ in range(size):
                    self.skip(et, depth + 1)
        elif t == _T_MAP:
            size = self.varint()
            if size:
                types = self.byte()
                if 2 * size > self.end - self.pos:
                    raise BoundsError("Thrift map longer than its data")
                for _ in range(size):
                    self.skip(types >> 4, depth + 1)
                    self.skip(types & 0x0F, depth + 1)
        elif t == _T_STRUCT:
            last_depth = depth + 1
            while True:
                head = self.byte()
                ft = head & 0x0F
                if ft == _T_STOP:
                    return
                if not head >> 4:
                    self.zigzag()
                self.skip(ft, last_depth)
        else:
            raise BoundsError(f"unknown Thrift type {t}")


def _int(d: dict[int, object], fid: int, what: str, required: bool = True) -> int:
    v = d.get(fid)
    if v is None and not required:
        return -1
    if not isinstance(v, int) or isinstance(v, bool):
        raise BoundsError(f"footer field {what} is missing or not an integer")
    return v


@dataclass
class ChunkBounds:
    """What one column chunk decodes to, from its page headers."""

    column: str
    physical: int
    slots: int = 0  # values incl. nulls and empty lists: the level count (leaf slots of a list column)
    data_pages: int = 0
    plain_bytes: int = 0  # uncompressed bytes of data pages (bounds plain-encoded strings)
    has_dictionary: bool = False
    dict_values: int = 0
    dict_bytes: int = 0
    largest_page: int = 0

    @property
    def decoded_bytes(self) -> int:
        """Upper bound of what pyarrow holds for this chunk, strings kept dictionary-encoded.

        8 bytes a slot (value, or a 4-byte dictionary index plus a 4-byte list offset), 4 for
        the definition and repetition levels, the page bytes themselves (plain strings), and
        the dictionary.
        """
        return self.slots * 12 + self.plain_bytes + self.dict_bytes


@dataclass
class FileBounds:
    num_rows: int
    row_groups: list[int] = field(default_factory=list)  # rows per row group
    chunks: list[ChunkBounds] = field(default_factory=list)

    @property
    def decoded_bytes(self) -> int:
        return sum(c.decoded_bytes for c in self.chunks)

    def slots(self, column: str) -> int:
        return sum(c.slots for c in self.chunks if c.column == column)


def footer_length(data: bytes) -> int:
    if len(data) < 12 or data[:4] != MAGIC or data[-4:] != MAGIC:
        if data[-4:] == b"PARE":
            raise BoundsError("is an encrypted Parquet file; trainguard never writes those")
        raise BoundsError("does not start and end with the Parquet magic bytes PAR1")
    n = struct.unpack("<I", data[-8:-4])[0]
    if n <= 0 or n > len(data) - 12:
        raise BoundsError(f"declares a footer of {n} bytes in a {len(data)}-byte file")
    return n


def measure(data: bytes, max_page_bytes: int, skip: tuple[str, ...] = ()) -> FileBounds:
    """Walk the footer and every page header of a Parquet file held in `data`.

    The page headers of columns named in `skip` (top-level names) are not walked: a reader
    that will not decode those columns needs no bound on them (their footer entries still are).

    Raises `BoundsError` for anything malformed: a footer or page header that does not parse,
    pages that do not tile their column chunk exactly, value counts that disagree between the
    footer and the pages, a page larger than `max_page_bytes` once decompressed, an unknown codec.
    """
    n = footer_length(data)
    start = len(data) - 8 - n
    meta = _Reader(data, start, len(data) - 8).struct(keep=_FOOTER)
    num_rows = _int(meta, 3, "num_rows")
    schema = meta.get(2)
    groups = meta.get(4)
    if not isinstance(schema, list) or not isinstance(groups, list):
        raise BoundsError("footer has no schema or row-group list")
    if num_rows < 0:
        raise BoundsError("footer declares a negative row count")
    out = FileBounds(num_rows)
    total_rows = 0
    for g in groups:
        if not isinstance(g, dict) or not isinstance(g.get(1), list):
            raise BoundsError("footer has a malformed row group")
        rows = _int(g, 3, "row group num_rows")
        if rows < 0:
            raise BoundsError("footer declares a negative row count")
        total_rows += rows
        out.row_groups.append(rows)
        for chunk in g[1]:
            if not isinstance(chunk, dict) or not isinstance(chunk.get(3), dict):
                raise BoundsError("footer has a column chunk without metadata")
            if chunk.get(1) is not None:
                raise BoundsError("has a column chunk stored in another file")
            out.chunks.append(_chunk(data, chunk[3], start, max_page_bytes, skip))
    if total_rows != num_rows:
        raise BoundsError(f"footer declares {num_rows} rows but its row groups hold {total_rows}")
    return out


def _chunk(data: bytes, md: dict[int, object], footer_start: int, max_page_bytes: int,
           skip: tuple[str, ...] = ()) -> ChunkBounds:
    path = md.get(3)
    name = b".".join(p for p in path if isinstance(p, bytes)).decode("utf-8", "replace") \
        if isinstance(path, list) else "?"
    if skip and isinstance(path, list) and path and isinstance(path[0], bytes) \
            and path[0].decode("utf-8", "replace") in skip:
        return ChunkBounds(name, _int(md, 1, "type"))  # not decoded, not walked
    codec = _int(md, 4, "codec")
    if codec not in _CODECS:
        raise BoundsError(f"column {name!r} uses compression codec {codec}, which trainguard never writes")
    num_values = _int(md, 5, "num_values")
    compressed = _int(md, 7, "total_compressed_size")
    data_off = _int(md, 9, "data_page_offset")
    dict_off = _int(md, 11, "dictionary_page_offset", required=False)
    if num_values == 0 and compressed == 0:  # a chunk of a row group with no rows: pyarrow writes no pages
        return ChunkBounds(name, _int(md, 1, "type"))
    first = dict_off if 0 < dict_off < data_off else data_off
    if num_values == 0 and data_off == 0 and dict_off > 0:  # no rows, only a dictionary page (data offset 0)
        first = dict_off
    end = first + compressed
    if num_values < 0 or compressed < 0 or first < 4 or end > footer_start:
        raise BoundsError(f"column {name!r} declares pages outside the file's data")
    out = ChunkBounds(name, _int(md, 1, "type"))
    pos = first
    while pos < end:
        r = _Reader(data, pos, end)
        header = r.struct(keep=_PAGE_HEADER)
        kind = _int(header, 1, "page type")
        raw = _int(header, 2, "uncompressed_page_size")
        size = _int(header, 3, "compressed_page_size")
        if raw < 0 or size < 0 or r.pos + size > end:
            raise BoundsError(f"column {name!r} has a page that runs past its column chunk")
        if raw > max_page_bytes:
            raise OverLimitError(f"column {name!r} has a page of {raw} bytes once decompressed, over the "
                              f"{max_page_bytes}-byte limit")
        out.largest_page = max(out.largest_page, raw)
        if kind == _PAGE_DICT:
            sub = header.get(7)
            count = _int(sub, 1, "dictionary num_values") if isinstance(sub, dict) else -1
            if count < 0 or out.has_dictionary or out.data_pages:
                raise BoundsError(f"column {name!r} has a malformed, second or misplaced dictionary page")
            out.has_dictionary, out.dict_values, out.dict_bytes = True, count, raw
        elif kind in (_PAGE_DATA, _PAGE_DATA_V2):
            sub = header.get(5 if kind == _PAGE_DATA else 8)
            count = _int(sub, 1, "page num_values") if isinstance(sub, dict) else -1
            if count < 0:
                raise BoundsError(f"column {name!r} has a data page without a value count")
            out.slots += count
            out.plain_bytes += raw
            out.data_pages += 1
        elif kind != _PAGE_INDEX:
            raise BoundsError(f"column {name!r} has a page of unknown type {kind}")
        pos = r.pos + size
    if pos != end:
        raise BoundsError(f"column {name!r}: its pages do not fill its column chunk exactly")
    if out.slots != num_values:
        raise BoundsError(f"column {name!r}: the footer declares {num_values} values but its pages hold {out.slots}")
    return out


def key_values(data: bytes) -> dict[bytes, bytes]:
    """The file's key-value metadata, read from the footer alone (no pyarrow, nothing decoded)."""
    n = footer_length(data)
    meta = _Reader(data, len(data) - 8 - n, len(data) - 8).struct(keep={5: {1: None, 2: None}})
    out: dict[bytes, bytes] = {}
    for kv in meta.get(5) or []:
        if isinstance(kv, dict) and isinstance(kv.get(1), bytes):
            value = kv.get(2)
            out[kv[1]] = value if isinstance(value, bytes) else b""
    return out
