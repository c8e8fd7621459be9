"""Exact byte encoding of estimator state (a flat mapping of names to numeric arrays), no pickle.

Layout (version 1): the ASCII line ``shadow-state 1``, one header line per array
``<name> TAB <numpy dtype string> TAB <shape, comma-separated> TAB <byte count>``, an empty line, then the arrays'
raw bytes in C order, in header order. Dtype strings carry the byte order (``<f8``), so a state written on one
machine reads back bit-identically on another. Only boolean, integer and floating arrays are accepted.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
from numpy.typing import NDArray

from shadow.errors import ConfigurationError

MAGIC = b"shadow-state 1\n"
_KINDS = "biuf"  # bool, signed and unsigned integers, floats


def pack_state(state: Mapping[str, NDArray[np.generic]]) -> bytes:
    """Encode ``state`` (name -> array) as bytes; :func:`unpack_state` gives back equal arrays, dtypes and shapes."""
    header = [MAGIC]
    payload = []
    for name in sorted(state):
        if not name or any(c in name for c in "\t\n"):
            raise ConfigurationError(f"state name {name!r}: must be non-empty, without tab or newline")
        a = np.asarray(state[name])  # (not ascontiguousarray: it turns 0-d arrays into 1-d ones)
        if a.dtype.kind not in _KINDS:
            raise ConfigurationError(f"state {name}: dtype {a.dtype} is not boolean, integer or float")
        raw = a.tobytes(order="C")
        shape = ",".join(str(d) for d in a.shape)
        header.append(f"{name}\t{a.dtype.str}\t{shape}\t{len(raw)}\n".encode())
        payload.append(raw)
    return b"".join([*header, b"\n", *payload])


def unpack_state(data: bytes) -> dict[str, NDArray[np.generic]]:
    """Decode bytes written by :func:`pack_state`; raises ConfigurationError on anything malformed."""
    if not data.startswith(MAGIC):
        raise ConfigurationError("state bytes: missing the 'shadow-state 1' header")
    end = data.find(b"\n\n", len(MAGIC) - 1)
    if end < 0:
        raise ConfigurationError("state bytes: header not terminated")
    lines = data[len(MAGIC) : end + 1].decode("ascii", errors="replace").splitlines()
    offset = end + 2
    out: dict[str, NDArray[np.generic]] = {}
    for line in lines:
        fields = line.split("\t")
        if len(fields) != 4:
            raise ConfigurationError(f"state bytes: bad header line {line!r}")
        name, dtype_str, shape_str, size_str = fields
        try:
            dtype = np.dtype(dtype_str)
            shape = tuple(int(d) for d in shape_str.split(",")) if shape_str else ()
            size = int(size_str)
        except (TypeError, ValueError) as exc:
            raise ConfigurationError(f"state bytes: bad header line {line!r} ({exc})") from exc
        if dtype.kind not in _KINDS or size != dtype.itemsize * int(np.prod(shape, dtype=np.int64)):
            raise ConfigurationError(f"state {name}: dtype {dtype_str}, shape {shape} and {size} bytes disagree")
        if offset + size > len(data):
            raise ConfigurationError(f"state {name}: truncated ({len(data) - offset} of {size} bytes)")
        out[name] = np.frombuffer(data, dtype=dtype, count=size // dtype.itemsize, offset=offset).reshape(shape).copy()
        offset += size
    if offset != len(data):
        raise ConfigurationError(f"state bytes: {len(data) - offset} trailing bytes")
    return out
