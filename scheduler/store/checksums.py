"""Checksums that make damage to the store's files visible when they are read.

Theory of operation. Every file the store writes carries a checksum of all its bytes, where a
reader finds it without an extra round trip, and every reader checks it before it believes
anything the file says. A mismatch is a :class:`~.errors.StorageCorrupt` naming the file and
what to do; nothing damaged is ever read as data. Where the checksum lives:

- **in the name**, for the Parquet files that many writers add to a folder (measurement parts
  and blocks, failure records, the CPU ledger's parts and blocks): the name ends with the
  first 32 hex digits of the SHA-256 of the file's bytes, ``part-t3-r0-a1-<sha>.parquet``,
  where a random token used to be. It still keeps concurrent writers apart (different bytes,
  different names; the same bytes make the same file). A flipped bit inside a file cannot
  touch its name, a file swapped for another no longer matches its name, the name is chosen
  before the atomic write, so nothing is renamed later (object stores have no rename), and
  compaction's records of which parts a block holds (names) stay as they are.
  ``sha256sum`` of such a file starts with the digits in its name.
- **inside the file**, for files with a fixed name, replaced whole: ``trials.parquet`` carries
  key-value metadata ``rungway.sha256``, the SHA-256 of the file with those 64 digits written
  as ``0``; the head's snapshot starts with ``{"sha256":"<hex>",``. The digest also covers the
  file's place (``<search name>/<path in the search folder>`` and a newline before the
  bytes), so a file copied into another search's folder, or over another search's file, does
  not verify there. One write replaces file and checksum together.
- **beside the file**, for ``spec.toml``, which stays byte for byte as the user wrote it:
  ``spec.toml.sha256`` in ``sha256sum`` format, written before the spec (so a spec never
  appears without it). The spec is written once per search; should it be replaced, the
  sidecar lists the new digest and the old one until the new spec is in place, so a crash
  between the two writes is not mistaken for damage.

Files written before checksums (format-2 stores of earlier rungway) have none: an old-style
name (an 8- or 16-digit token), no metadata key, no sidecar. They are read as before,
unverified. A checksum whose own bytes are damaged must not make a file look old: a snapshot
whose start is *almost* a checksum (a few characters off), or a trials table with a metadata
key a bit or two away from ``rungway.sha256``, is reported as damaged.
"""

from __future__ import annotations

import hashlib
import json
import re
import uuid

import pyarrow as pa
import pyarrow.parquet as pq

from .errors import StorageCorrupt

__all__ = [
    "NAME_DIGITS",
    "EMBEDDED_KEY",
    "sha256_hex",
    "name_digest",
    "parquet_bytes",
    "check_named",
    "sealed_parquet_bytes",
    "check_sealed_parquet",
    "sidecar_text",
    "sidecar_digests",
    "seal_json",
    "open_json",
]

NAME_DIGITS = 32
_NAMED = re.compile(rf"-([0-9a-f]{{{NAME_DIGITS}}})\.parquet")
EMBEDDED_KEY = b"rungway.sha256"
_HEX = frozenset(b"0123456789abcdef")
_JSON_HEAD = b'{"sha256":"'


def sha256_hex(data: bytes, label: str | None = None) -> str:
    """SHA-256 of ``data``; with a ``label`` (a file's place), of the label, a newline, then data."""
    digest = hashlib.sha256()
    if label is not None:
        digest.update(label.encode("utf-8") + b"\n")
    digest.update(data)
    return digest.hexdigest()


# -- checksums in names ----------------------------------------------------------------------


def name_digest(name: str) -> str | None:
    """The digest digits a file name ends with, or None for a name of the old shape."""
    match = _NAMED.search(name)
    return match.group(1) if match and match.end() == len(name) else None


def parquet_bytes(table: pa.Table) -> bytes:
    """``table`` as the bytes of one Parquet file (written whole, then named after them)."""
    out = pa.BufferOutputStream()
    pq.write_table(table, out)
    return out.getvalue().to_pybytes()


def check_named(path: str, data: bytes, remedy: str) -> bool:
    """Raise StorageCorrupt if ``data`` does not hash to the digest in ``path``'s name. Returns
    whether there was a digest to check (False: a file of the old shape, read unverified)."""
    expected = name_digest(path.rsplit("/", 1)[-1])
    if expected is None:
        return False
    actual = sha256_hex(data)
    if not actual.startswith(expected):
        raise StorageCorrupt(
            f"{path} is damaged: its {len(data)} bytes do not match the checksum in its name "
            f"(SHA-256 {actual[:NAME_DIGITS]}); {remedy}",
            path=path,
        )
    return True


# -- checksums inside Parquet files of a fixed name ------------------------------------------


def sealed_parquet_bytes(table: pa.Table, label: str) -> bytes:
    """One Parquet file whose metadata ``rungway.sha256`` is the digest of ``label`` and the file
    with that value's 64 characters written as ``0``: a checksum of every other byte."""
    nonce = (uuid.uuid4().hex * 2).encode()
    metadata = dict(table.schema.metadata or {})
    metadata[EMBEDDED_KEY] = nonce
    data = bytearray(parquet_bytes(table.replace_schema_metadata(metadata)))
    at = data.rfind(nonce)
    if at < 0 or data.find(nonce) != at:  # pyarrow keeps the plain value once, in the footer
        raise AssertionError("the checksum's place in the Parquet footer was not found exactly once")
    data[at : at + 64] = b"0" * 64
    data[at : at + 64] = sha256_hex(bytes(data), label).encode()
    return bytes(data)


def check_sealed_parquet(path: str, data: bytes, label: str, remedy: str) -> bool:
    """Raise StorageCorrupt unless ``data`` matches its embedded checksum. Returns whether it had
    one (False: a file of the old shape, read unverified)."""

    def damaged(why: str) -> StorageCorrupt:
        return StorageCorrupt(f"{path} is damaged: {why}; {remedy}", path=path)

    try:
        metadata = pq.read_metadata(pa.BufferReader(data)).metadata or {}
    except (pa.ArrowException, OSError, ValueError) as exc:
        raise damaged(f"it is not readable Parquet ({exc})") from None
    expected = metadata.get(EMBEDDED_KEY)
    if expected is None:
        if EMBEDDED_KEY in data or any(_near_key(key) for key in metadata):
            # A file written with a checksum whose footer no longer shows it: a flipped bit in
            # the footer's structure or in the key; never a file of the old shape.
            raise damaged("its checksum cannot be found in its footer")
        return False
    at = data.rfind(expected)
    if len(expected) != 64 or not set(expected) <= _HEX or at < 0:
        raise damaged("its checksum is damaged")
    actual = sha256_hex(data[:at] + b"0" * 64 + data[at + 64 :], label)
    if actual.encode() != expected:
        raise damaged(f"its {len(data)} bytes do not match their checksum (damaged, or copied here from "
                      f"another place than {label})")
    return True


def _near_key(key: bytes) -> bool:
    return len(key) == len(EMBEDDED_KEY) and key != EMBEDDED_KEY and _mismatches(key, EMBEDDED_KEY) <= 2


# -- checksums inside text files of a fixed name ---------------------------------------------


def _mismatches(data: bytes, template: bytes) -> int:
    """Positions where ``data`` differs from ``template``; ``x`` in the template stands for a
    lowercase hex digit, ``|`` for ``,`` or ``}``. Only the overlap is compared."""
    count = 0
    for got, want in zip(data, template):
        if want == ord("x"):
            count += got not in _HEX
        elif want == ord("|"):
            count += got not in b",}"
        else:
            count += got != want
    return count


def _looks_sealed(data: bytes, template: bytes) -> bool:
    """Whether ``data`` starts with something within 3 characters of ``template`` (a checksum line
    that a flipped bit damaged), or is all a cut-short start of one."""
    if len(data) >= len(template):
        return _mismatches(data[: len(template)], template) <= 3
    return bool(data) and _mismatches(data, template) == 0


def sidecar_text(digests: list[str], file_name: str) -> bytes:
    """A ``sha256sum``-style sidecar: one ``<hex>  <file name>`` line per digest, newest first."""
    return "".join(f"{digest}  {file_name}\n" for digest in digests).encode()


def sidecar_digests(data: bytes, file_name: str) -> list[str] | None:
    """The digests a sidecar lists for ``file_name``; None if it is not a well-formed sidecar."""
    lines = data.split(b"\n")
    if not data.endswith(b"\n") or len(lines) > 3:
        return None
    digests = []
    for line in lines[:-1]:
        match = _SIDECAR_LINE.fullmatch(line.decode("ascii", "replace"))
        if match is None or match.group(2) != file_name:
            return None
        digests.append(match.group(1))
    return digests or None


_SIDECAR_LINE = re.compile(r"([0-9a-f]{64})  (\S+)")


_JSON_TEMPLATE = _JSON_HEAD + b"x" * 64 + b'"|'


def seal_json(text: str, label: str) -> bytes:
    """A JSON object's text with its checksum as the first member: ``{"sha256":"<hex>", ...}``;
    the digest covers ``label`` and ``text`` exactly as given."""
    try:
        empty = json.loads(text) == {}
    except ValueError as exc:
        raise ValueError(f"only the text of a JSON object can carry a checksum ({exc})") from None
    body = text.encode("utf-8")
    if not body.startswith(b"{"):
        raise ValueError("only the text of a JSON object, starting with '{', can carry a checksum")
    return _JSON_HEAD + sha256_hex(body, label).encode() + (b'"' if empty else b'",') + body[1:]


def open_json(data: bytes, label: str, path: str, remedy: str) -> str:
    """The JSON text of a sealed object (checked), or of an old one without a checksum."""
    head = len(_JSON_HEAD) + 64
    digest = data[len(_JSON_HEAD) : head]
    if data[: len(_JSON_HEAD)] == _JSON_HEAD and data[head : head + 1] == b'"' and set(digest) <= _HEX:
        rest = data[head + 1 :]
        body = b"{" + (rest[1:] if rest.startswith(b",") else rest)  # no comma: an empty object
        if sha256_hex(body, label).encode() != digest:
            raise StorageCorrupt(f"{path} is damaged: its bytes do not match their checksum (damaged, or copied "
                                 f"here from another place than {label}); {remedy}", path=path)
        return body.decode("utf-8")
    if _looks_sealed(data, _JSON_TEMPLATE):
        raise StorageCorrupt(f"{path} is damaged: its checksum is damaged; {remedy}", path=path)
    try:
        text = data.decode("utf-8")
        json.loads(text)
    except ValueError as exc:
        raise StorageCorrupt(f"{path} is damaged: not a JSON object ({exc}); {remedy}", path=path) from None
    return text

