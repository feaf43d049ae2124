"""The certificate container: format name, version, exact array encoding, gzip JSON.

Shared by the writer (:mod:`certify.certificate`) and the independent checker
(:mod:`certify.check`); it holds no proof logic.
"""

from __future__ import annotations

import base64
import gzip
import io
import json
import zlib
from fractions import Fraction
from pathlib import Path

import numpy as np

from .errors import CertificateError
from .files import atomic_writer

__all__ = ["FORMAT", "VERSION", "READABLE_VERSIONS", "CERTIFICATE_NAME", "certificate_path", "LABELS",
           "encode_array", "decode_array", "fraction_text", "parameter_differences",
           "narrowed_text", "write_certificate", "load_certificate_json", "read_gzip_json"]

FORMAT = "certify-certificate"
#: File name of a certificate inside an output folder.
CERTIFICATE_NAME = "certificate.json.gz"
VERSION = 3
#: Versions this tool reads (version 2 stores every step's frame; docs/certificate-format.md).
READABLE_VERSIONS = (2, 3)
LABELS = ("safe", "doomed", "outside", "undecided")


#: The stored types of the compact codecs (``<f8`` only in float patches).
ITEMS = ("<i1", "<i2", "<i4", "<i8", "<f4", "<f8")


def encode_array(a, dtype="<f8"):
    """Encode an array exactly and compactly (docs/certificate-format.md, "Arrays").

    Floats are stored as binary32 where that is exact and as binary64 patches elsewhere;
    integers as differences along the first axis in the narrowest integer type; the bytes
    are grouped by significance and compressed with zlib. :func:`decode_array` gives back
    the same values, bit for bit, with dtype `dtype`.

    Parameters
    ----------
    a : array_like
    dtype : {"<f8", "<i8"}
        The type of the decoded array.

    Returns
    -------
    dict
        ``{"dtype", "shape", "codec", "item", "data"}`` and, for floats with values
        binary32 cannot hold, ``"patch_at"`` and ``"patch"``.
    """
    a = np.asarray(a)
    if np.dtype(dtype).kind == "i" and a.dtype.kind == "i" and a.ndim == 1:
        return _encode_ints(a, dtype)
    a = np.ascontiguousarray(a, dtype=dtype)
    out = {"dtype": dtype, "shape": list(a.shape)}
    if a.dtype.kind == "f":
        with np.errstate(over="ignore"):
            narrow = a.astype("<f4")
        wide = narrow.astype("<f8")
        exact = (wide == a) | (np.isnan(wide) & np.isnan(a))
        # a NaN keeps its bits only in a patch
        exact &= ~np.isnan(a) | (wide.view("<i8") == a.view("<i8"))
        at = np.flatnonzero(~exact.reshape(-1))
        out.update(codec="zlib-float32", item="<f4", data=_pack(narrow))
        if len(at):
            out["patch_at"] = encode_array(at, "<i8")
            out["patch"] = _pack(a.reshape(-1)[at])
        return out
    steps = np.diff(a, axis=0, prepend=np.zeros((1,) + a.shape[1:], a.dtype))
    return _delta(out, steps)


def _encode_ints(a, dtype):
    """:func:`encode_array` of a 1-D integer array, without a copy of it in `dtype`
    first (successor lists hold tens of millions of 32-bit leaf numbers)."""
    steps = np.empty(len(a), dtype)
    steps[:1] = a[:1]
    np.subtract(a[1:], a[:-1], out=steps[1:], dtype=dtype)
    return _delta({"dtype": dtype, "shape": [len(a)]}, steps)


def _delta(out, steps):
    """`out` with the differences `steps` stored in the narrowest integer type."""
    item = next(t for t in ("<i1", "<i2", "<i4", "<i8")
                if steps.size == 0 or (np.iinfo(t).min <= steps.min()
                                       and steps.max() <= np.iinfo(t).max))
    out.update(codec="zlib-delta", item=item, data=_pack(steps.astype(item)))
    return out


def _pack(a):
    """Base64 of the zlib-compressed bytes of `a`, grouped by byte significance."""
    size = a.dtype.itemsize
    grouped = np.ascontiguousarray(a).reshape(-1).view(np.uint8).reshape(-1, size).T
    return base64.b64encode(zlib.compress(grouped.tobytes(), 6)).decode("ascii")


def _unpack(text, item, count):
    """Inverse of :func:`_pack`: `count` values of dtype `item` (errors: ValueError)."""
    size = np.dtype(item).itemsize
    expected = count * size
    inflate = zlib.decompressobj()
    try:
        raw = inflate.decompress(base64.b64decode(text, validate=True), expected + 1)
    except zlib.error as exc:
        raise ValueError(f"compressed data damaged ({exc})") from None
    if len(raw) != expected:
        raise ValueError(f"truncated or too long: {len(raw) / size:g} values where the shape "
                         f"needs {count}")
    if not inflate.eof:
        raise ValueError("the compressed data is truncated")
    if inflate.unused_data:
        raise ValueError("data after the compressed stream")
    grouped = np.frombuffer(raw, np.uint8).reshape(size, count).T
    return np.ascontiguousarray(grouped).view(item).reshape(-1)


def decode_array(obj, where="array"):
    """Decode an array written by :func:`encode_array` (or by version 2's plain form).

    Returns
    -------
    ndarray
        Of dtype ``<f8`` or ``<i8``.

    Raises
    ------
    CertificateError
        When the object is malformed: an unknown type or codec, data that do not fit
        the shape (truncated arrays), damaged compressed data.
    """
    try:
        if obj["dtype"] not in ("<f8", "<i8"):
            raise ValueError(f"dtype {obj['dtype']!r}")
        dtype = np.dtype(obj["dtype"])
        shape = tuple(int(s) for s in obj["shape"])
        if any(s < 0 for s in shape):
            raise ValueError("negative shape")
        if "codec" not in obj:      # version 2: plain little-endian bytes
            raw = base64.b64decode(obj["data"], validate=True)
            return np.frombuffer(raw, dtype=dtype).reshape(shape).copy()
        count = int(np.prod(shape, dtype=np.int64))
        codec, item = obj["codec"], obj["item"]
        if item not in ITEMS:
            raise ValueError(f"item {item!r}")
        item = np.dtype(item)
        if codec == "zlib-float32" and dtype.kind == "f" and item == np.dtype("<f4"):
            flat = _unpack(obj["data"], item, count).astype(dtype)
            if "patch_at" in obj:
                at = decode_array(obj["patch_at"], f"{where}.patch_at")
                if not isinstance(obj["patch"], str):
                    raise ValueError("patch")
                if at.ndim != 1 or np.any(at < 0) or np.any(at >= count):
                    raise ValueError("a patch lies outside the array")
                if len(np.unique(at)) != len(at):
                    raise ValueError("a position is patched twice")
                flat[at] = _unpack(obj["patch"], dtype, len(at))
            return flat.reshape(shape)
        if codec == "zlib-delta" and dtype.kind == "i" and item.kind == "i":
            steps = _unpack(obj["data"], item, count).astype(dtype).reshape(shape)
            return np.cumsum(steps, axis=0, dtype=dtype) if len(shape) else steps
        raise ValueError(f"codec {codec!r} with item {item.str} does not fit dtype {dtype.str}")
    except CertificateError:
        raise
    except (KeyError, TypeError, ValueError, OverflowError) as exc:
        raise CertificateError(f"malformed {where} in the certificate ({exc})") from None


def fraction_text(q):
    """Exact text of a rational: ``"p/q"`` (or ``"p"``)."""
    q = Fraction(q)
    return str(q.numerator) if q.denominator == 1 else f"{q.numerator}/{q.denominator}"


def parameter_differences(proven, stated):
    """The parameters whose proven box differs from the box the model file states.

    Parameters
    ----------
    proven, stated : dict
        Parameter name -> ``(lo, hi)`` exact numbers: the boxes a map is proven for (the
        certificate's ``parameters``) and the boxes of the model file's text.

    Returns
    -------
    list of dict
        ``{"name", "proven": ["lo", "hi"], "model": ["lo", "hi"]}`` with exact text
        (:func:`fraction_text`), in the order of `proven`; a parameter the file does
        not state has ``"model": None``.

    Examples
    --------
    >>> parameter_differences({"C": (70, 70), "r": (1, 1)}, {"C": (70, 90), "r": (1, 1)})
    [{'name': 'C', 'proven': ['70', '70'], 'model': ['70', '90']}]
    """
    out = []
    for name, (lo, hi) in proven.items():
        box = stated.get(name)
        if box is None or (Fraction(box[0]), Fraction(box[1])) != (Fraction(lo), Fraction(hi)):
            out.append({"name": name, "proven": [fraction_text(lo), fraction_text(hi)],
                        "model": None if box is None else [fraction_text(b) for b in box]})
    return out


def narrowed_text(differences):
    """One phrase per entry of :func:`parameter_differences`: ``C = 70 (file: [70, 90])``."""
    def box(pair):
        return pair[0] if pair[0] == pair[1] else f"[{pair[0]}, {pair[1]}]"
    return ", ".join(f"{d['name']} = {box(d['proven'])} (file: "
                     f"{'not stated' if d['model'] is None else box(d['model'])})"
                     for d in differences)


def write_certificate(path, data):
    """Write a certificate dictionary as gzip-compressed JSON, atomically.

    Parameters
    ----------
    path : str or Path
    data : dict
        JSON-serialisable content (arrays already encoded).
    """
    # streamed: the JSON text (several times the size of the step arrays) is never held whole
    with atomic_writer(path) as raw, \
            gzip.GzipFile(filename="", mode="wb", fileobj=raw, compresslevel=6, mtime=0) as gz, \
            io.TextIOWrapper(gz, encoding="utf-8", newline="") as text:
        for chunk in json.JSONEncoder(separators=(",", ":")).iterencode(data):
            text.write(chunk)


def certificate_path(path):
    """The certificate file meant by `path`: the path itself, or a folder's certificate."""
    path = Path(path)
    return path / CERTIFICATE_NAME if path.is_dir() else path


def _what_it_is(path):
    """A few words on what a file that is not a certificate looks like."""
    try:
        with open(path, "rb") as f:
            head = f.read(64)
    except OSError:
        return "an unreadable file"
    if head[:2] == b"\x1f\x8b":
        return "gzip-compressed data that is not a certificate's JSON"
    text = head.lstrip()
    if text[:1] == b"#" or text[:2].isalpha() or text[:1] == b"[" and text[1:2].isalpha():
        return "text (a model file?)"
    if text[:1] in (b"{", b"["):
        return "JSON that is not gzip-compressed"
    return "data that is not gzip-compressed"


def read_gzip_json(path, expected):
    """The JSON data of a gzip-compressed file.

    Parameters
    ----------
    path : Path
    expected : str
        What the file should be, for messages ("a certificate (...)").

    Raises
    ------
    CertificateError
        Missing or unreadable file, damaged compressed data, not gzip or not JSON.
    """
    try:
        with gzip.open(path, "rb") as f:
            return json.loads(f.read().decode("utf-8"))
    except FileNotFoundError:
        raise CertificateError(f"{path}: no such file") from None
    except PermissionError:
        raise CertificateError(f"{path}: cannot read the file (permission denied)") from None
    except (EOFError, zlib.error):
        raise CertificateError(f"{path}: the compressed data is truncated or damaged; "
                               f"expected {expected}") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError, gzip.BadGzipFile):
        raise CertificateError(f"{path}: {_what_it_is(path)}; expected {expected}") from None


def load_certificate_json(path):
    """Read the raw certificate dictionary, checking format and version.

    `path` may name the certificate file or a folder holding ``certificate.json.gz``.

    Raises
    ------
    CertificateError
        Unreadable file, not gzip/JSON, unknown format or version.
    """
    given = Path(path)
    path = certificate_path(given)
    if given.is_dir() and not path.exists():
        raise CertificateError(f"{given}: the folder holds no {CERTIFICATE_NAME}")
    data = read_gzip_json(path, f"a certificate ({CERTIFICATE_NAME}, gzip-compressed JSON)")
    if not isinstance(data, dict) or data.get("format") != FORMAT:
        raise CertificateError(f"{path}: not a certify certificate (key 'format')")
    if data.get("version") not in READABLE_VERSIONS:
        raise CertificateError(f"{path}: unknown certificate version {data.get('version')!r} "
                               f"(this tool reads versions "
                               f"{', '.join(map(str, READABLE_VERSIONS))})")
    return data
