"""How values are stored: compressed float64 matrices, compressed JSON, JSON fields.

Matrices are little-endian float64 behind a small header (magic, rows, columns),
compressed as one Zstandard frame (level 3; ``bench/store_codecs.py`` compares it with
zlib: smaller than zlib level 6 and several times faster to pack and unpack). Blobs
written before that are one zlib stream of the same bytes; the first four bytes tell
them apart — a Zstandard frame opens with its magic number ``28 B5 2F FD`` (RFC 8878,
3.1.1), a zlib stream with a CMF byte whose low nibble is 8 (RFC 1950), so ``0x78``
here — and ``unpack_matrix`` reads both. Labels are compact JSON compressed with zlib.
"""

from __future__ import annotations

import json
import struct
import zlib
from typing import Any

import numpy as np
import zstandard

_MATRIX_HEADER = struct.Struct("<4sqq")
_MATRIX_MAGIC = b"LWM1"
LEVEL = 6  # zlib, for labels (and the level of matrices stored before Zstandard)
MATRIX_LEVEL = 3  # Zstandard's own default level
_ZSTD_MAGIC = b"\x28\xb5\x2f\xfd"


def text(value: bytes | str | None) -> str | None:
    """A Redis reply as ``str`` (``None`` stays ``None``)."""
    return value.decode() if isinstance(value, bytes) else value


def pack_matrix(X: np.ndarray) -> bytes:
    arr = np.ascontiguousarray(X, dtype="<f8")
    header = _MATRIX_HEADER.pack(_MATRIX_MAGIC, arr.shape[0], arr.shape[1])
    # one frame that records its content size (so unpacking allocates once); the
    # array's memory is compressed in place, not copied to bytes first
    packer = zstandard.ZstdCompressor(level=MATRIX_LEVEL).compressobj(
        size=len(header) + arr.nbytes)
    body = arr.view(np.uint8).reshape(-1).data
    return packer.compress(header) + packer.compress(body) + packer.flush()


def unpack_matrix(blob: bytes) -> np.ndarray:
    """A stored matrix, Zstandard (now) or zlib (blobs stored before)."""
    if blob[:4] == _ZSTD_MAGIC:
        raw = zstandard.ZstdDecompressor().decompress(blob)
    else:
        raw = zlib.decompress(blob)
    magic, n, d = _MATRIX_HEADER.unpack_from(raw)
    if magic != _MATRIX_MAGIC:
        raise ValueError("not a stored matrix")
    return np.frombuffer(raw, dtype="<f8", offset=_MATRIX_HEADER.size).reshape(n, d).astype(float)


def pack_json(value: Any) -> bytes:
    return zlib.compress(json.dumps(value, separators=(",", ":")).encode(), LEVEL)


def unpack_json(blob: bytes) -> Any:
    return json.loads(zlib.decompress(blob))


def dumps(value: Any) -> str:
    return json.dumps(value)


def loads(raw: bytes | str) -> Any:
    return json.loads(raw)


def json_fields(fields: dict[str, Any]) -> dict[str, str]:
    """A hash's fields, each value as JSON."""
    return {k: json.dumps(v) for k, v in fields.items()}


def from_json_fields(raw: dict[bytes, bytes]) -> dict[str, Any]:
    return {text(k): json.loads(v) for k, v in raw.items()}
