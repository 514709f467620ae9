"""The model file: one ``.npz`` archive, no pickle, checksummed.

Layout (format ``seawall-model``, version 1):

- ``manifest``: UTF-8 JSON as a ``uint8`` array (format, version, parameters,
  thresholds, training summary, metrics, creation time, ``sha256``);
- ``row_delta``: the stored bucket ids, sorted and delta-encoded (first id,
  then gaps), in the narrowest unsigned dtype that holds the largest gap;
- ``table_q`` (k, d) ``int8``, ``table_scale`` (k / block,) ``float16``,
  ``table_zero`` (k / block,) ``int8``: affine int8 quantization of the
  embedding rows, ``x ≈ scale * (q - zero)`` (Jacob et al. 2018), with the
  range of each row (or block of rows) widened to contain 0 so that 0 is
  exact;
- ``head_*``: the dense head, ``float32``.

Only the buckets training touched are stored.  ``sha256`` covers every array
(name, dtype, shape, bytes) and the manifest without its own ``sha256`` field,
so changing any stored value is detected.  Reading goes through
``np.load(allow_pickle=False)``; any failure becomes :class:`ArtifactError`.
"""
from __future__ import annotations

import hashlib
import io
import json
import struct
import tokenize
import zipfile
import zlib

import numpy as np

from model.errors import ArtifactError

FORMAT = "seawall-model"
FORMAT_VERSION = 1
MANIFEST = "manifest"


# --- affine int8 quantization ------------------------------------------------

def quantize(x: np.ndarray, block: int = 1) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Affine int8 quantization of the rows of ``x``, one (scale, zero point) per ``block`` rows.

    Parameters
    ----------
    x : np.ndarray (k, d), float.
    block : rows that share one scale and zero point (1 = per row).

    Returns
    -------
    q : np.ndarray (k, d) int8
    scale : np.ndarray (ceil(k / block),) float16, > 0
    zero : np.ndarray (ceil(k / block),) int8

    Notes
    -----
    For a block with used range ``[lo, hi]`` widened to contain 0,
    ``scale = (hi - lo) / 255`` (rounded up to float16) and ``zero =
    round(-128 - lo / scale)``; every value then round-trips within
    ``scale / 2`` of the stored scale (Jacob et al. 2018, eq. 1).

    Examples
    --------
    >>> q, s, z = quantize(np.array([[-1.0, 0.0, 0.5]]))
    >>> bool(np.all(np.abs(dequantize(q, s, z) - [[-1.0, 0.0, 0.5]]) <= s[0] / 2))
    True
    """
    x = np.asarray(x, dtype=np.float32)
    k, d = x.shape
    if block < 1:
        raise ValueError(f"quantize: block must be >= 1, got {block!r}")
    nb = -(-k // block)
    pad = nb * block - k
    padded = np.concatenate([x, np.zeros((pad, d), np.float32)]) if pad else x
    blocks = padded.reshape(nb, block * d) if k else np.zeros((0, max(d, 1)), np.float32)
    lo = np.minimum(blocks.min(axis=1, initial=0.0), 0.0).astype(np.float64)
    hi = np.maximum(blocks.max(axis=1, initial=0.0), 0.0).astype(np.float64)
    exact = (hi - lo) / 255.0
    exact[exact <= 0] = 1.0
    # Stored as float16 (half the bytes, and the scales are most of the file),
    # rounded up so that the block's whole range still fits in 256 steps.
    scale = exact.astype(np.float16)
    low = scale.astype(np.float64) < exact
    scale[low] = np.nextafter(scale[low], np.float16(np.inf))
    scale = np.maximum(scale, np.float16(2.0**-24))
    s64 = scale.astype(np.float64)
    zero = np.clip(np.round(-128.0 - lo / s64), -128, 127)
    per_row_scale = np.repeat(s64, block)[:k, None]
    per_row_zero = np.repeat(zero, block)[:k, None]
    q = np.clip(np.round(x / per_row_scale) + per_row_zero, -128, 127).astype(np.int8)
    return q, scale, zero.astype(np.int8)


def dequantize(q: np.ndarray, scale: np.ndarray, zero: np.ndarray, block: int = 1) -> np.ndarray:
    """Inverse of :func:`quantize`: ``scale * (q - zero)`` as float32."""
    k = q.shape[0]
    s = np.repeat(scale.astype(np.float32), block)[:k, None]
    z = np.repeat(zero.astype(np.float32), block)[:k, None]
    return (s * (q.astype(np.float32) - z)).astype(np.float32)


# --- row ids -----------------------------------------------------------------

def encode_rows(rows: np.ndarray) -> np.ndarray:
    """Sorted bucket ids as first id + gaps, in the narrowest unsigned dtype."""
    rows = np.asarray(rows, dtype=np.int64)
    if rows.size and np.any(np.diff(rows) <= 0):
        raise ValueError("encode_rows: rows must be strictly increasing")
    delta = np.diff(rows, prepend=0)
    top = int(delta.max()) if delta.size else 0
    dtype = np.uint8 if top < 2**8 else np.uint16 if top < 2**16 else np.uint32
    return delta.astype(dtype)


def decode_rows(delta: np.ndarray) -> np.ndarray:
    return np.cumsum(delta.astype(np.int64))


# --- the stored model --------------------------------------------------------

def encode_model(rows: np.ndarray, values: np.ndarray, head: dict, block: int = 1) -> dict[str, np.ndarray]:
    """The stored arrays of a model: embedding ``values`` of ``rows`` (sorted
    bucket ids), quantized in blocks of ``block`` rows, and the dense ``head``.

    Examples
    --------
    >>> arrays = encode_model(np.array([3, 9]), np.ones((2, 2), np.float32), {"b2": [0.5]})
    >>> sorted(arrays)
    ['head_b2', 'row_delta', 'table_q', 'table_scale', 'table_zero']
    >>> rows, values, head = decode_model(arrays, 1)
    >>> rows.tolist(), values.round(2).tolist(), head["b2"].tolist()
    ([3, 9], [[1.0, 1.0], [1.0, 1.0]], [0.5])
    """
    q, scale, zero = quantize(values, block)
    return {
        "row_delta": encode_rows(rows),
        "table_q": q,
        "table_scale": scale,
        "table_zero": zero,
        **{f"head_{k}": np.asarray(v, dtype=np.float32) for k, v in head.items()},
    }


def decode_model(arrays: dict[str, np.ndarray], block: int) -> tuple[np.ndarray, np.ndarray, dict]:
    """``(rows, values, head)`` from :func:`encode_model`'s arrays; values dequantized to float32."""
    rows = decode_rows(arrays["row_delta"])
    values = dequantize(arrays["table_q"], arrays["table_scale"], arrays["table_zero"], block)
    head = {k[len("head_"):]: v.astype(np.float32) for k, v in arrays.items() if k.startswith("head_")}
    return rows, values, head


# --- file --------------------------------------------------------------------

def checksum(arrays: dict[str, np.ndarray], manifest: dict) -> str:
    """sha256 over every array (sorted by name) and the manifest minus ``sha256``."""
    h = hashlib.sha256()
    for name in sorted(arrays):
        a = np.ascontiguousarray(arrays[name])
        h.update(name.encode())
        h.update(a.dtype.str.encode())
        h.update(repr(a.shape).encode())
        h.update(a.tobytes())
    body = {k: v for k, v in manifest.items() if k != "sha256"}
    h.update(json.dumps(body, sort_keys=True, separators=(",", ":")).encode())
    return h.hexdigest()


def dumps(arrays: dict[str, np.ndarray], manifest: dict) -> tuple[bytes, dict]:
    """Serialize arrays plus manifest; returns the bytes and the final manifest (with sha256)."""
    if MANIFEST in arrays:
        raise ValueError(f"dumps: {MANIFEST!r} is reserved")
    for name, a in arrays.items():
        if a.dtype == object:
            raise ValueError(f"dumps: array {name!r} has dtype object; only numeric arrays are stored")
    manifest = dict(manifest, format=FORMAT, format_version=FORMAT_VERSION)
    manifest["sha256"] = checksum(arrays, manifest)
    blob = np.frombuffer(json.dumps(manifest, sort_keys=True).encode("utf-8"), dtype=np.uint8)
    buf = io.BytesIO()
    np.savez_compressed(buf, **{MANIFEST: blob}, **arrays)
    return buf.getvalue(), manifest


def loads(data: bytes) -> tuple[dict[str, np.ndarray], dict]:
    """Read and verify an artifact; returns ``(arrays, manifest)``.

    Raises
    ------
    ArtifactError
        On a file that is not an archive, is truncated, holds a pickled or
        object array, lacks a manifest, has another format or version, or
        whose sha256 does not match its contents.
    """
    if not data.startswith(b"PK\x03\x04"):
        raise ArtifactError("load model: not a model file (no .npz archive header); check the path or retrain")
    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as npz:
            arrays = {name: npz[name] for name in npz.files}
    except ValueError as exc:
        if "pickle" in str(exc).lower():
            raise ArtifactError("load model: the file holds a pickled (object) array; refusing to unpickle it") from None
        raise ArtifactError(f"load model: not a readable model file ({exc}); retrain or copy it again") from None
    except (zipfile.BadZipFile, zlib.error, EOFError, OSError, KeyError, zipfile.LargeZipFile,
            # A damaged archive or .npy header also surfaces as these (zipfile: an unknown
            # compression method or a set "encrypted" flag; numpy: an unparsable header or dtype).
            NotImplementedError, RuntimeError, SyntaxError, tokenize.TokenError, TypeError, struct.error) as exc:
        raise ArtifactError(
            f"load model: truncated or not a model file ({type(exc).__name__}); retrain or copy it again"
        ) from None
    blob = arrays.pop(MANIFEST, None)
    if blob is None or blob.dtype != np.uint8 or blob.ndim != 1:
        raise ArtifactError("load model: the file has no manifest; it is not a Seawall model")
    try:
        manifest = json.loads(blob.tobytes().decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError):
        raise ArtifactError("load model: the manifest is not valid JSON; the file is corrupt") from None
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        raise ArtifactError("load model: the file is not a Seawall model (unknown format)")
    if manifest.get("format_version") != FORMAT_VERSION:
        raise ArtifactError(
            f"load model: format version {manifest.get('format_version')!r} is not supported "
            f"(this Seawall reads version {FORMAT_VERSION}); retrain the model"
        )
    expected = manifest.get("sha256")
    if not isinstance(expected, str) or checksum(arrays, manifest) != expected:
        raise ArtifactError("load model: checksum mismatch; the file was modified or corrupted")
    return arrays, manifest
