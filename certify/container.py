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

__all__ = ["FORMAT", "VERSION", "CERTIFICATE_NAME", "certificate_path", "LABELS",
           "encode_array", "decode_array", "fraction_text", "parameter_differences",
           "narrowed_text", "write_certificate", "load_certificate_json"]

FORMAT = "certify-certificate"
#: File name of a certificate inside an output folder.
CERTIFICATE_NAME = "certificate.json.gz"
VERSION = 2
LABELS = ("safe", "doomed", "outside", "undecided")


def encode_array(a, dtype="<f8"):
    """Encode an array exactly as ``{"dtype", "shape", "data"}`` (base64)."""
    a = np.ascontiguousarray(np.asarray(a), dtype=dtype)
    return {"dtype": dtype, "shape": list(a.shape),
            "data": base64.b64encode(a.tobytes()).decode("ascii")}


def decode_array(obj, where="array"):
    """Decode an array written by :func:`encode_array`.

    Raises
    ------
    CertificateError
        When the object is malformed.
    """
    try:
        dtype = np.dtype(obj["dtype"])
        if dtype.kind not in "fi" or dtype.itemsize != 8:
            raise ValueError("dtype")
        shape = tuple(int(s) for s in obj["shape"])
        raw = base64.b64decode(obj["data"], validate=True)
        return np.frombuffer(raw, dtype=dtype).reshape(shape).copy()
    except (KeyError, TypeError, ValueError) as exc:
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
    expected = f"expected a certificate ({CERTIFICATE_NAME}, gzip-compressed JSON)"
    try:
        with gzip.open(path, "rb") as f:
            data = json.loads(f.read().decode("utf-8"))
    except FileNotFoundError:
        if given.is_dir():
            raise CertificateError(f"{given}: the folder holds no {CERTIFICATE_NAME}") from None
        raise CertificateError(f"{path}: no such file") from None
    except PermissionError:
        raise CertificateError(f"{path}: cannot read the file (permission denied)") from None
    except (EOFError, zlib.error):
        raise CertificateError(f"{path}: the compressed data is truncated or damaged; "
                               f"{expected}") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError, gzip.BadGzipFile):
        raise CertificateError(f"{path}: {_what_it_is(path)}; {expected}") from None
    if not isinstance(data, dict) or data.get("format") != FORMAT:
        raise CertificateError(f"{path}: not a certify certificate (key 'format')")
    if data.get("version") != VERSION:
        raise CertificateError(f"{path}: unknown certificate version {data.get('version')!r} "
                               f"(this tool reads version {VERSION})")
    return data
