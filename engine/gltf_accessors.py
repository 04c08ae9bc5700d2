"""glTF 2.0 files at the byte level: the GLB container, buffers, URIs and accessors.

The JSON document is parsed by pygltflib; everything binary is read here with numpy, following
the glTF 2.0 specification (Khronos, 2021): section 4.4 (GLB container), 3.6 (buffers, buffer views,
accessors: componentType, type, normalized, byteOffset, byteStride, sparse), 3.11 (normalized
integers to floats). Errors are one line naming the file and the JSON path of the culprit, through
`GltfFile.fail`.
"""

from __future__ import annotations

import base64
import json
import struct
from pathlib import Path, PurePosixPath
from urllib.parse import unquote

import numpy as np

from lampyr.errors import AssetError

# componentType -> little-endian numpy dtype (spec 3.6.2.2)
COMPONENT_DTYPES = {5120: np.dtype("<i1"), 5121: np.dtype("<u1"), 5122: np.dtype("<i2"),
                    5123: np.dtype("<u2"), 5125: np.dtype("<u4"), 5126: np.dtype("<f4")}
COMPONENT_NAMES = {5120: "BYTE", 5121: "UNSIGNED_BYTE", 5122: "SHORT", 5123: "UNSIGNED_SHORT",
                   5125: "UNSIGNED_INT", 5126: "FLOAT"}
# accessor.type -> (columns, rows): a matrix is stored column by column
TYPE_SHAPES = {"SCALAR": (1, 1), "VEC2": (1, 2), "VEC3": (1, 3), "VEC4": (1, 4),
               "MAT2": (2, 2), "MAT3": (3, 3), "MAT4": (4, 4)}

GLB_MAGIC = 0x46546C67  # "glTF"
GLB_JSON = 0x4E4F534A  # "JSON"
GLB_BIN = 0x004E4942  # "BIN\0"


def quoted(text) -> str:
    """A value as it would be written in JSON (strings in double quotes)."""
    return json.dumps(text) if isinstance(text, str) else repr(text)


class GltfFile:
    """One glTF file being read: its document, raw buffers, and where errors point.

    path: the file on disk; shown: how errors name it; key: the shot-file key errors name.
    """

    def __init__(self, path, key: str, shown: str | None = None):
        self.path = Path(path)
        self.key = key
        self.shown = shown if shown is not None else self.path.name
        self.doc = None
        self.tree: dict = {}  # the raw JSON, for the few properties pygltflib has no field for
        self.glb_bin: bytes | None = None
        self._buffers: dict[int, bytes] = {}

    # ---------------------------------------------------------------------------------- errors

    def fail(self, where: str, problem: str):
        """Raise the one-line AssetError: `key: "file" where: problem`."""
        place = f"{quoted(self.shown)} {where}" if where else quoted(self.shown)
        raise AssetError(self.key, f"{place}: {problem}")

    # ---------------------------------------------------------------------------------- loading

    def load(self) -> None:
        """Read the file: a GLB container or a JSON .gltf, parsed by pygltflib."""
        import pygltflib

        try:
            raw = self.path.read_bytes()
        except OSError as exc:
            self.fail("", f"expected a readable glTF file, got an error reading it: {exc.strerror or exc}")
        if not raw:
            self.fail("", "expected a glTF file (a GLB container or JSON text), got an empty file")
        if raw[:4] == b"glTF":
            text = self._split_glb(raw)
        else:
            try:
                text = raw.decode("utf-8-sig")
            except UnicodeDecodeError:
                self.fail("", "expected a glTF file (a GLB container or JSON text), got bytes that are neither")
        try:
            tree = json.loads(text)
        except ValueError as exc:
            self.fail("", f"expected a glTF file (a GLB container or JSON text), got text that is not "
                          f"JSON ({str(exc).splitlines()[0]})")
        if not isinstance(tree, dict) or not isinstance(tree.get("asset"), dict):
            self.fail("asset", "expected a glTF document (a JSON object with an asset property), got none")
        version = str(tree["asset"].get("version", ""))
        if not version.startswith("2."):
            self.fail("asset.version", f"expected glTF 2.x, got {quoted(version)}")
        self.tree = tree
        try:
            self.doc = pygltflib.GLTF2.from_json(text)
        except Exception as exc:  # pygltflib raises many kinds on malformed documents
            first = (str(exc).strip().splitlines() or [type(exc).__name__])[0]
            self.fail("", f"expected a well-formed glTF document, got one pygltflib cannot read: {first}")

    def _split_glb(self, raw: bytes) -> str:
        """The JSON text of a GLB container (spec 4.4); keeps its BIN chunk in `glb_bin`."""
        if len(raw) < 20:
            self.fail("", f"expected a GLB container of at least 20 bytes, got {len(raw)} bytes")
        magic, version, length = struct.unpack_from("<III", raw, 0)
        if version != 2:
            self.fail("", f"expected a GLB container of version 2, got version {version}")
        if length > len(raw):
            self.fail("", f"expected the {length} bytes the GLB header announces, got a file of {len(raw)} "
                          f"bytes (truncated?)")
        offset, text = 12, None
        while offset + 8 <= length:
            chunk_len, chunk_type = struct.unpack_from("<II", raw, offset)
            body = raw[offset + 8: offset + 8 + chunk_len]
            if len(body) < chunk_len:
                self.fail("", f"expected a GLB chunk of {chunk_len} bytes at byte {offset}, got "
                              f"{len(body)} bytes (truncated?)")
            if text is None:
                if chunk_type != GLB_JSON:
                    self.fail("", "expected the GLB container's first chunk to be JSON, got another kind")
                try:
                    text = body.decode("utf-8")
                except UnicodeDecodeError:
                    self.fail("", "expected UTF-8 JSON in the GLB container's first chunk, got other bytes")
            elif chunk_type == GLB_BIN and self.glb_bin is None:
                self.glb_bin = bytes(body)
            offset += 8 + chunk_len + (-chunk_len % 4)
        if text is None:
            self.fail("", "expected a JSON chunk in the GLB container, got none")
        return text

    # ---------------------------------------------------------------------------------- URIs

    def read_uri(self, uri, where: str) -> tuple[bytes, str | None]:
        """(bytes, mime type or None) of a data URI or of a file beside the glTF file.

        A file URI is percent-decoded (RFC 3986) and must name a file inside the glTF file's
        folder: an absolute path, a scheme (http:) or a `..` part is refused."""
        if not isinstance(uri, str) or not uri:
            self.fail(where, f"expected a URI, got {quoted(uri)}")
        if uri.startswith("data:"):
            head, sep, payload = uri.partition(",")
            if not sep or not head.endswith(";base64"):
                self.fail(where, "expected a base64 data URI (data:<mime>;base64,...), got another form")
            try:
                data = base64.b64decode(payload, validate=True)
            except ValueError:
                self.fail(where, "expected valid base64 in the data URI, got characters or padding that "
                                 "do not decode")
            return data, head[5:-7] or None
        shown = uri if len(uri) <= 80 else uri[:77] + "..."
        decoded = unquote(uri)
        rel = PurePosixPath(decoded.replace("\\", "/"))
        first = rel.parts[0] if rel.parts else ""
        if rel.is_absolute() or ":" in first:
            self.fail(where, f"expected a file path relative to the glTF file's folder, got {quoted(shown)}")
        if ".." in rel.parts:
            self.fail(where, f"expected a file inside the glTF file's folder (no '..'), got {quoted(shown)}")
        target = self.path.parent / rel
        try:
            return target.read_bytes(), None
        except OSError:
            self.fail(where, f"expected an existing file beside the glTF file, got {quoted(shown)}, "
                             f"which is not there or not readable")

    # ---------------------------------------------------------------------------------- buffers

    def buffer(self, index: int) -> bytes:
        """The bytes of buffers[index] (the GLB chunk, a data URI or a file), checked against
        its byteLength."""
        if index in self._buffers:
            return self._buffers[index]
        buffers = self.doc.buffers or []
        if not isinstance(index, int) or not 0 <= index < len(buffers):
            self.fail("buffers", f"expected a buffer with index {index}, got {len(buffers)} buffers")
        buf = buffers[index]
        where = f"buffers[{index}]"
        if buf.uri is None:
            if index != 0 or self.glb_bin is None:
                self.fail(where, "expected a uri (only the first buffer of a GLB file may omit it), got none")
            data = self.glb_bin
        else:
            data, _ = self.read_uri(buf.uri, where + ".uri")
        length = buf.byteLength
        if not isinstance(length, int) or length < 0:
            self.fail(where + ".byteLength", f"expected a byte count, got {quoted(length)}")
        if len(data) < length:
            self.fail(where, f"expected {length} bytes (its byteLength), got {len(data)} bytes")
        self._buffers[index] = data
        return data

    def view_bytes(self, index, where: str) -> tuple[memoryview, int | None]:
        """(bytes of bufferViews[index], its byteStride or None)."""
        views = self.doc.bufferViews or []
        if not isinstance(index, int) or not 0 <= index < len(views):
            self.fail(where, f"expected a bufferView index below {len(views)}, got {quoted(index)}")
        view = views[index]
        vwhere = f"bufferViews[{index}]"
        data = self.buffer(view.buffer)
        start = view.byteOffset or 0
        length = view.byteLength
        if not isinstance(length, int) or not isinstance(start, int) or start < 0 or length < 0:
            self.fail(vwhere, f"expected a byteOffset and byteLength, got {quoted(start)} and {quoted(length)}")
        if start + length > len(data):
            self.fail(vwhere, f"expected bytes {start}..{start + length} of buffers[{view.buffer}], got a "
                              f"buffer of {len(data)} bytes")
        return memoryview(data)[start:start + length], view.byteStride

    # ---------------------------------------------------------------------------------- accessors

    def accessor(self, index, where: str, normalize: bool = True) -> np.ndarray:
        """The elements of accessors[index] as numpy: (count,) for SCALAR, (count, n) for
        vectors, (count, 4, 4) row-major float64 for MAT4 (and MAT2 / MAT3 alike).

        Floats and normalized integers come back float64 (spec 3.11: c / (2^n - 1) unsigned,
        max(c / (2^(n-1) - 1), -1) signed) when `normalize`; other integers as int64. Sparse
        substitution (spec 3.6.2.3) is applied. `where` names the referring property."""
        accessors = self.doc.accessors or []
        if not isinstance(index, int) or not 0 <= index < len(accessors):
            self.fail(where, f"expected an accessor index below {len(accessors)}, got {quoted(index)}")
        acc = accessors[index]
        awhere = f"accessors[{index}]"
        if acc.componentType not in COMPONENT_DTYPES:
            self.fail(awhere + ".componentType", f"expected one of {sorted(COMPONENT_DTYPES)}, got "
                                                 f"{quoted(acc.componentType)}")
        if acc.type not in TYPE_SHAPES:
            self.fail(awhere + ".type", f"expected one of {', '.join(TYPE_SHAPES)}, got {quoted(acc.type)}")
        count = acc.count
        if not isinstance(count, int) or count < 0:
            self.fail(awhere + ".count", f"expected a count >= 0, got {quoted(count)}")
        dtype = COMPONENT_DTYPES[acc.componentType]
        cols, rows = TYPE_SHAPES[acc.type]
        raw = np.zeros((count, cols, rows), dtype)
        if acc.bufferView is not None:
            raw[...] = self._strided(acc, awhere, dtype, cols, rows)
        if acc.sparse is not None:
            self._apply_sparse(acc, awhere, raw)
        return self._finish(raw, acc, dtype, cols, normalize)

    def _strided(self, acc, awhere: str, dtype, cols: int, rows: int) -> np.ndarray:
        """The accessor's elements straight from its bufferView, as (count, cols, rows)."""
        data, stride = self.view_bytes(acc.bufferView, awhere + ".bufferView")
        size = dtype.itemsize
        # spec 3.6.2.4: each matrix column starts on a 4-byte boundary
        col_bytes = rows * size if cols == 1 else -(-rows * size // 4) * 4
        elem = col_bytes * (cols - 1) + rows * size
        elem_padded = col_bytes * cols if cols > 1 else elem
        if stride is not None and stride < elem:
            self.fail(f"bufferViews[{acc.bufferView}].byteStride", f"expected at least {elem} bytes (one {acc.type} "
                                                                   f"{COMPONENT_NAMES[acc.componentType]} element of "
                                                                   f"{awhere}), got {stride}")
        stride = stride or elem_padded
        offset = acc.byteOffset or 0
        if not isinstance(offset, int) or offset < 0:
            self.fail(awhere + ".byteOffset", f"expected a byte offset >= 0, got {quoted(offset)}")
        if offset % size:
            self.fail(awhere + ".byteOffset", f"expected a multiple of the component size {size}, got {offset}")
        count = acc.count
        need = offset + stride * (count - 1) + elem if count else offset
        if need > len(data):
            self.fail(awhere, f"expected {need} bytes in bufferViews[{acc.bufferView}] for {count} "
                              f"{acc.type} {COMPONENT_NAMES[acc.componentType]} elements, got {len(data)} bytes")
        if count == 0:
            return np.zeros((0, cols, rows), dtype)
        return np.ndarray((count, cols, rows), dtype, buffer=data, offset=offset,
                          strides=(stride, col_bytes, size))

    def _apply_sparse(self, acc, awhere: str, raw: np.ndarray) -> None:
        """Substitute the sparse elements (spec 3.6.2.3) into `raw` (count, cols, rows)."""
        sparse = acc.sparse
        swhere = awhere + ".sparse"
        n = sparse.count
        if not isinstance(n, int) or not 1 <= n <= len(raw):
            self.fail(swhere + ".count", f"expected 1..{len(raw)} substituted elements, got {quoted(n)}")
        ind, val = sparse.indices, sparse.values
        if ind is None or val is None:
            self.fail(swhere, "expected indices and values, got one of them missing")
        if ind.componentType not in (5121, 5123, 5125):
            self.fail(swhere + ".indices.componentType", f"expected 5121, 5123 or 5125, got {quoted(ind.componentType)}")
        idx = self._tight(ind.bufferView, ind.byteOffset, COMPONENT_DTYPES[ind.componentType], n, 1,
                          swhere + ".indices").reshape(n).astype(np.int64)
        if np.any(np.diff(idx) <= 0):
            self.fail(swhere + ".indices", "expected strictly increasing indices, got others")
        if n and idx[-1] >= len(raw):
            self.fail(swhere + ".indices", f"expected indices below the accessor's count {len(raw)}, "
                                           f"got {int(idx[-1])}")
        cols, rows = raw.shape[1:]
        values = self._tight(val.bufferView, val.byteOffset, raw.dtype, n, cols * rows, swhere + ".values")
        raw[idx] = values.reshape(n, cols, rows)

    def _tight(self, view, offset, dtype, n: int, width: int, where: str) -> np.ndarray:
        """n tightly packed elements of `width` components from a bufferView (sparse parts)."""
        data, _ = self.view_bytes(view, where + ".bufferView")
        offset = offset or 0
        need = offset + n * width * dtype.itemsize
        if need > len(data):
            self.fail(where, f"expected {need} bytes in bufferViews[{view}], got {len(data)} bytes")
        return np.frombuffer(data, dtype, n * width, offset).reshape(n, width)

    @staticmethod
    def _finish(raw: np.ndarray, acc, dtype, cols: int, normalize: bool) -> np.ndarray:
        """(count, cols, rows) file values -> the documented output shape and dtype."""
        count, _, rows = raw.shape
        if dtype.kind == "f":
            out = raw.astype(np.float64)
        elif acc.normalized and normalize:
            bits = dtype.itemsize * 8
            if dtype.kind == "u":
                out = raw.astype(np.float64) / float(2 ** bits - 1)
            else:
                out = np.maximum(raw.astype(np.float64) / float(2 ** (bits - 1) - 1), -1.0)
        else:
            out = raw.astype(np.int64)
        if cols > 1:  # stored column by column: element [c, r] is row r of column c
            return np.ascontiguousarray(np.transpose(out, (0, 2, 1)))
        return out.reshape(count) if rows == 1 else out.reshape(count, rows)


def index_of(gf: GltfFile, value, n: int, where: str, what: str) -> int:
    """A reference to item `value` of a list of `n` (-1 when absent)."""
    if value is None:
        return -1
    if isinstance(value, bool) or not isinstance(value, int) or not 0 <= value < n:
        gf.fail(where, f"expected a {what} index below {n}, got {quoted(value)}")
    return value


def vector(gf: GltfFile, value, n: int, where: str, default) -> np.ndarray:
    """`n` finite numbers from the JSON as float64 (n,), or `default` when absent."""
    if value is None:
        return np.array(default, np.float64)
    arr = np.asarray(value, dtype=object)
    if arr.shape != (n,) or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value):
        gf.fail(where, f"expected {n} numbers, got {quoted(value)}")
    out = np.array(value, np.float64)
    if not np.all(np.isfinite(out)):
        gf.fail(where, f"expected finite numbers, got {quoted(value)}")
    return out
