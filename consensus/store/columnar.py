"""Frames as compact bytes, and back, exactly: how the store keeps large tables.

A run at 100,000 item × location series has millions of cells; one row per
cell in SQL costs several hundred bytes with its indexes.  Stored as columns
instead, each numeric column is byte-shuffled (all first bytes of the values,
then all second bytes, …, the filter HDF5 and Blosc use) and deflated with
zlib, and each text column is stored as its distinct values plus integer
codes.  Reading gives back the same dtypes and, for floats, the same bits.

Layout: ``MAGIC``, a 4-byte length, a JSON header (columns, dtypes, lengths of
each column's parts), then the parts.  Deterministic: the same frame always
gives the same bytes, so a content hash identifies a frame.
"""

from __future__ import annotations

import hashlib
import io
import json
import struct
import zipfile
import zlib

import numpy as np
import pandas as pd

MAGIC = b"CFR1"
_LEVEL = 6
#: Decimal places tried for a float column that holds rounded numbers (stored exactly as scaled integers).
_DECIMALS = (0, 3, 6)
_MAX_EXACT = 2.0 ** 52


def _shuffle(values: np.ndarray) -> bytes:
    raw = np.ascontiguousarray(values)
    width = raw.dtype.itemsize
    if width == 1 or raw.size == 0:
        return raw.tobytes()
    return raw.view(np.uint8).reshape(-1, width).T.tobytes()


def _unshuffle(data: bytes, dtype: np.dtype, n: int) -> np.ndarray:
    width = dtype.itemsize
    if width == 1 or n == 0:
        return np.frombuffer(data, dtype=dtype, count=n).copy()
    return np.frombuffer(data, dtype=np.uint8).reshape(width, n).T.copy().view(dtype).reshape(n)


def _scaled_integers(values: np.ndarray) -> tuple[int, np.ndarray, np.ndarray] | None:
    """(decimals, integers, NaN mask) when every finite value is k / 10^decimals exactly, else None.

    Rounded quantities (a plan stated in thousandths of a unit) then cost a few
    bytes each instead of eight; the test is exact, so reading gives the same bits.
    """
    finite = np.isfinite(values)
    nan = np.isnan(values)
    if not (finite | nan).all():
        return None
    kept = values[finite]
    for decimals in _DECIMALS:
        scale = 10.0 ** decimals
        scaled = np.round(kept * scale)
        if kept.size and np.abs(scaled).max() >= _MAX_EXACT:
            return None
        if np.array_equal(scaled / scale, kept) and not np.any(np.signbit(kept) & (kept == 0)):
            integers = np.zeros(values.shape, dtype=np.int64)
            integers[finite] = scaled.astype(np.int64)
            return decimals, integers, nan
    return None


def _codes_dtype(n_values: int) -> np.dtype:
    return np.dtype(np.int8 if n_values < 127 else np.int16 if n_values < 32_767 else np.int32)


def pack_frame(frame: pd.DataFrame) -> bytes:
    """The frame as bytes (index dropped).  Columns: numbers, booleans, datetimes or text (None/NaN kept)."""
    header: dict = {"rows": int(len(frame)), "columns": []}
    parts: list[bytes] = []
    for name in frame.columns:
        column = frame[name]
        entry: dict = {"name": str(name)}
        kind = column.dtype.kind
        if kind in "biuf" and not isinstance(column.dtype, pd.CategoricalDtype):
            if column.dtype.name in ("Int64", "Int32", "boolean", "Float64"):
                raise TypeError(f"column {name!r}: nullable pandas dtypes are not packed; convert first")
            values = column.to_numpy()
            scaled = _scaled_integers(values) if values.dtype == np.float64 else None
            if scaled is not None:
                decimals, integers, nan = scaled
                entry.update(kind="scaled", dtype=values.dtype.str, decimals=decimals)
                blobs = [zlib.compress(_shuffle(integers), _LEVEL), zlib.compress(np.packbits(nan).tobytes(), _LEVEL)]
                entry["parts"] = [len(b) for b in blobs]
                parts += blobs
            else:
                entry.update(kind="array", dtype=values.dtype.str)
                blob = zlib.compress(_shuffle(values), _LEVEL)
                entry["parts"] = [len(blob)]
                parts.append(blob)
        elif kind == "M":
            raw = column.to_numpy()
            values = raw.view(np.int64)
            entry.update(kind="datetime", dtype="<i8", unit=raw.dtype.str)
            blob = zlib.compress(_shuffle(values), _LEVEL)
            entry["parts"] = [len(blob)]
            parts.append(blob)
        else:
            codes, uniques = pd.factorize(column.astype(object), sort=False, use_na_sentinel=True)
            texts = [None if v is None else str(v) if not isinstance(v, bool) else v for v in uniques.tolist()]
            dtype = _codes_dtype(len(texts))
            entry.update(kind="text", dtype=dtype.str, strings=isinstance(column.dtype, pd.StringDtype))
            values_blob = zlib.compress(json.dumps(texts, ensure_ascii=False).encode("utf-8"), _LEVEL)
            codes_blob = zlib.compress(_shuffle(codes.astype(dtype)), _LEVEL)
            entry["parts"] = [len(values_blob), len(codes_blob)]
            parts += [values_blob, codes_blob]
        header["columns"].append(entry)
    head = json.dumps(header, separators=(",", ":")).encode("utf-8")
    return MAGIC + struct.pack("<I", len(head)) + head + b"".join(parts)


def unpack_frame(data: bytes) -> pd.DataFrame:
    """The frame :func:`pack_frame` wrote."""
    if data[:4] != MAGIC:
        raise ValueError("not a packed frame")
    (length,) = struct.unpack("<I", data[4:8])
    header = json.loads(data[8:8 + length])
    offset = 8 + length
    n = header["rows"]
    out: dict[str, object] = {}
    for entry in header["columns"]:
        sizes = entry["parts"]
        chunks = []
        for size in sizes:
            chunks.append(zlib.decompress(data[offset:offset + size]))
            offset += size
        dtype = np.dtype(entry["dtype"])
        if entry["kind"] == "array":
            out[entry["name"]] = _unshuffle(chunks[0], dtype, n)
        elif entry["kind"] == "scaled":
            integers = _unshuffle(chunks[0], np.dtype(np.int64), n)
            values = integers / 10.0 ** entry["decimals"]
            nan = np.unpackbits(np.frombuffer(chunks[1], dtype=np.uint8), count=n).astype(bool)
            values[nan] = np.nan
            out[entry["name"]] = values
        elif entry["kind"] == "datetime":
            out[entry["name"]] = _unshuffle(chunks[0], dtype, n).view(entry.get("unit", "<M8[ns]"))
        else:
            texts = np.array(json.loads(chunks[0].decode("utf-8")) + [None], dtype=object)
            codes = _unshuffle(chunks[1], dtype, n).astype(np.int64)
            values = texts[codes]  # code -1 (missing) picks the trailing None
            out[entry["name"]] = pd.Series(values, dtype="str" if entry.get("strings") else object, copy=False)
    frame = pd.DataFrame({name: (value if isinstance(value, pd.Series) else pd.Series(value, copy=False))
                          for name, value in out.items()}, columns=[e["name"] for e in header["columns"]])
    return frame.set_axis(pd.RangeIndex(n), axis=0) if len(frame.columns) else pd.DataFrame(index=pd.RangeIndex(n))


def frame_digest(frame: pd.DataFrame) -> str:
    """A content hash of a frame's values and column names (index ignored), for cache keys."""
    h = hashlib.sha256()
    h.update(json.dumps([str(c) for c in frame.columns]).encode())
    h.update(str(len(frame)).encode())
    if len(frame):
        hashed = pd.util.hash_pandas_object(frame.reset_index(drop=True), index=False).to_numpy()
        h.update(hashed.tobytes())
    return h.hexdigest()


def digest_of(*parts) -> str:
    """sha256 of text parts (frames by their digest), joined unambiguously."""
    h = hashlib.sha256()
    for part in parts:
        text = frame_digest(part) if isinstance(part, pd.DataFrame) else json.dumps(part, sort_keys=True,
                                                                                     default=str)
        h.update(len(text).to_bytes(8, "little"))
        h.update(text.encode())
    return h.hexdigest()


def pack_frames(frames: dict[str, pd.DataFrame]) -> bytes:
    """Several named frames as one byte string (a zip of packed frames, stored, with fixed dates)."""
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_STORED) as archive:
        for name, frame in frames.items():
            archive.writestr(zipfile.ZipInfo(name, date_time=(1980, 1, 1, 0, 0, 0)), pack_frame(frame))
    return buffer.getvalue()


def unpack_frames(content: bytes) -> dict[str, pd.DataFrame]:
    """The frames :func:`pack_frames` wrote, in their order."""
    with zipfile.ZipFile(io.BytesIO(content)) as archive:
        return {name: unpack_frame(archive.read(name)) for name in archive.namelist()}
