"""What the first bytes of an input file say about it: compression, byte-order mark.

One place for the checks every reader shares (FASTA, GFF3, BED, model tables and
manifest): inputs are plain text or gzip-compressed plain text, ASCII or UTF-8,
with LF or CRLF line ends.  A UTF-8 byte-order mark is accepted (and dropped);
other compressions and encodings are named in the error, so the user learns what
the file is instead of reading a parse error about its bytes.
"""

from __future__ import annotations

__all__ = [
    "CR_ONLY",
    "MAGIC_BYTES",
    "UTF8_BOM",
    "sniff",
    "unsupported_message",
]

#: UTF-8 byte-order mark (EF BB BF), accepted at the start of any text input.
UTF8_BOM = b"\xef\xbb\xbf"

#: (leading bytes, what they mean), longest first where two could both match.
#: Compression magic numbers: gzip (RFC 1952, 1f 8b), bzip2 ("BZh"), xz (fd 37 7a 58
#: 5a 00), Zstandard (RFC 8878, 28 b5 2f fd), zip local file header ("PK\x03\x04");
#: byte-order marks of UTF-32 and UTF-16 (The Unicode Standard, section 23.8).
MAGIC_BYTES: tuple[tuple[bytes, str], ...] = (
    (b"\x1f\x8b", "gzip"),
    (b"BZh", "bzip2"),
    (b"\xfd7zXZ\x00", "xz"),
    (b"\x28\xb5\x2f\xfd", "zstd"),
    (b"PK\x03\x04", "zip"),
    (b"\xff\xfe\x00\x00", "UTF-32"),
    (b"\x00\x00\xfe\xff", "UTF-32"),
    (b"\xff\xfe", "UTF-16"),
    (b"\xfe\xff", "UTF-16"),
)

#: How many leading bytes :func:`sniff` needs to tell every case apart.
SNIFF_BYTES = 6

#: The words used for a file with carriage returns that end no line feed.
CR_ONLY = (
    "has carriage returns (CR) without line feeds: CR-only line endings (classic Mac OS); "
    "expected LF or CRLF line endings"
)


def sniff(head: bytes) -> str | None:
    """What the first bytes ``head`` show: ``gzip``, ``bzip2``, ``xz``, ``zstd``, ``zip``,
    ``UTF-16``, ``UTF-32``, or None for anything else (plain text, possibly with a
    UTF-8 byte-order mark)."""
    for magic, kind in MAGIC_BYTES:
        if head.startswith(magic):
            return kind
    return None


def unsupported_message(kind: str, *, inside_gzip: bool = False) -> str:
    """The error text for an input that :func:`sniff` found to be ``kind`` (not gzip)."""
    if kind in ("UTF-16", "UTF-32"):
        return (
            f"is {kind} text (it starts with a {kind} byte-order mark); "
            "expected ASCII or UTF-8 text"
        )
    if inside_gzip:
        if kind == "gzip":
            return "compressed twice with gzip (gzip inside gzip); only plain and gzip are read"
        return f"compressed with {kind} inside gzip; only plain and gzip are read"
    if kind == "zip":
        return "is a zip archive; only plain and gzip are read"
    return f"compressed with {kind}; only plain and gzip are read"
