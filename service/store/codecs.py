"""How values are stored: compressed float64 matrices, compressed JSON, JSON fields.

Matrices are little-endian float64 behind a small header (magic, rows, columns) and
compressed with zlib; labels are compact JSON, compressed the same way.
"""

from __future__ import annotations

import json
import struct
import zlib
from typing import Any

import numpy as np

_MATRIX_HEADER = struct.Struct("<4sqq")
_MATRIX_MAGIC = b"LWM1"
LEVEL = 6


def text(value: bytes | str | None) -> str | None:
    """A Redis reply as ``str`` (``None`` stays ``None``)."""
    return value.decode() if isinstance(value, bytes) else value


def pack_matrix(X: np.ndarray) -> bytes:
    arr = np.ascontiguousarray(X, dtype="<f8")
    header = _MATRIX_HEADER.pack(_MATRIX_MAGIC, arr.shape[0], arr.shape[1])
    packer = zlib.compressobj(LEVEL)  # compressed from the array's memory, not a bytes copy
    return packer.compress(header) + packer.compress(memoryview(arr)) + packer.flush()


def unpack_matrix(blob: bytes) -> np.ndarray:
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
