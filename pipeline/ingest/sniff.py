"""A look at a file before it is staged: format, compression, text encoding, delimiter.

Spreadsheet software and other systems send files that are not the contract's
comma-separated UTF-8 CSV.  Read as such they would fail row by row with a
misleading reason (a semicolon-separated file "lacks columns"; a Latin-1 file's rows
are "malformed").  This module recognises them from the first bytes and the header
line and either reads them the right way or refuses them with the right advice:

* Parquet (``PAR1``) is passed on; a ZIP/OLE2 container is a spreadsheet workbook
  (``.xlsx``, ``.ods``, ``.xls``): "export it as CSV"; other compressions than gzip
  and binary content (NUL bytes, control characters) are refused.
* ``.csv.gz`` (gzip, by its magic bytes) is decompressed into a private temporary copy.
* Text that is not UTF-8 is refused with "not UTF-8 (looks like Latin-1/Windows-1252)",
  unless ``encoding`` names its encoding: then it is decoded into a private UTF-8 copy.
  UTF-16 (byte-order mark) is named as such.
* The delimiter (comma, semicolon, tab, pipe) is the one that splits the header line
  into the most known column names; ``delimiter="auto"`` reads the file with it, an
  explicit delimiter that does not fit is refused with "looks semicolon-separated".
* A header with more columns than any file of the study can have is refused at once
  (100,000 columns would otherwise cost DuckDB a long staging).

The SHA-256 of a batch is always that of the original file; only DuckDB and the
line scans read the copy.  Messages never quote the file's content.
"""

from __future__ import annotations

import codecs
import csv
import gzip
import io
import os
import tempfile
import unicodedata
import zipfile
import zlib
from dataclasses import dataclass
from pathlib import Path

from takeup.pipeline.errors import IngestError

__all__ = ["SourcePlan", "sniff_source", "DELIMITERS", "check_encoding_name", "MAX_HEADER_BYTES"]

#: the delimiters recognised by ``--delimiter auto``, with the words used in messages
DELIMITERS = {",": "comma", ";": "semicolon", "\t": "tab", "|": "pipe"}
#: a first line longer than this is not a header line
MAX_HEADER_BYTES = 16 << 20
_HEAD = 1 << 20
_COPY_CHUNK = 1 << 20


@dataclass(frozen=True)
class SourcePlan:
    """How to read one file: format, delimiter, and the path DuckDB reads.

    ``read_path`` is the original file, or a private UTF-8 copy (``temporary``) that
    the caller removes with :meth:`cleanup`.  ``note`` says what was done, for the report.
    """

    fmt: str                      # csv | parquet
    read_path: Path
    delimiter: str = ","
    temporary: bool = False
    note: str | None = None

    def cleanup(self) -> None:
        if self.temporary:
            try:
                os.unlink(self.read_path)
            except FileNotFoundError:
                pass


def check_encoding_name(encoding: str) -> str:
    """The codec's canonical name; raises ValueError with the accepted spelling for an unknown one."""
    try:
        return codecs.lookup(encoding).name
    except LookupError:
        raise ValueError(f"unknown text encoding {encoding!r} (e.g. utf-8, latin-1, cp1252, utf-16)") from None


def _container(head: bytes, name: str) -> str | None:
    """A refusal message for spreadsheets, archives and other compressions, else None."""
    if head.startswith(b"PK\x03\x04") or head.startswith(b"PK\x05\x06"):
        kind = "a ZIP archive"
        low = name.lower()
        if low.endswith((".xlsx", ".xlsm")) or b"xl/" in head[:4096] or b"[Content_Types].xml" in head[:4096]:
            kind = "an Excel workbook (.xlsx)"
        elif low.endswith(".ods") or b"opendocument.spreadsheet" in head[:4096]:
            kind = "an OpenDocument spreadsheet (.ods)"
        if kind == "a ZIP archive":
            return f"{name}: the file is a ZIP archive, not a CSV or Parquet file; unpack it and send the CSV files"
        return f"{name}: the file is {kind}, not a CSV file; export it as CSV (UTF-8, comma-separated) and send that"
    if head.startswith(b"\xd0\xcf\x11\xe0\xa1\xb1\x1a\xe1"):
        return (f"{name}: the file is an Excel 97-2003 workbook (.xls), not a CSV file; export it as CSV "
                "(UTF-8, comma-separated) and send that")
    for magic, what in ((b"\x28\xb5\x2f\xfd", "zstd"), (b"BZh", "bzip2"), (b"\xfd7zXZ\x00", "xz"),
                        (b"7z\xbc\xaf\x27\x1c", "7-Zip")):
        if head.startswith(magic):
            return f"{name}: the file is {what}-compressed; only gzip (.csv.gz) is read: decompress it or use gzip"
    return None


def _binary(head: bytes, name: str) -> str | None:
    """A refusal message for content that is not text (checked on the first bytes)."""
    if not head:
        return None
    nul = head.find(b"\x00")
    if nul >= 0:
        return (f"{name}: the file looks binary (a NUL byte at byte {nul + 1}), not CSV text; send a CSV (UTF-8) "
                "or Parquet file")
    control = sum(head.count(bytes([b])) for b in range(32) if b not in (9, 10, 12, 13))
    if control * 10 > len(head):
        return (f"{name}: the file looks binary ({control} control bytes in the first {len(head)}), not CSV text; "
                "send a CSV (UTF-8) or Parquet file")
    return None


def _open_text_bytes(path: Path, gz: bool):
    return gzip.open(path, "rb") if gz else open(path, "rb")


def _read_head(path: Path, gz: bool) -> bytes:
    """The first MiB of the (decompressed) content; more, up to the end of the first line, if it is longer."""
    with _open_text_bytes(path, gz) as fh:
        head = fh.read(_HEAD)
        while b"\n" not in head and len(head) < MAX_HEADER_BYTES:
            more = fh.read(_HEAD)
            if not more:
                break
            head += more
    return head


def _first_bad_utf8(data: bytes) -> int | None:
    """Byte offset of the first invalid UTF-8 sequence in ``data`` (a cut sequence at the end is fine)."""
    dec = codecs.getincrementaldecoder("utf-8")("strict")
    try:
        dec.decode(data, final=False)
    except UnicodeDecodeError as exc:
        return exc.start
    return None


def _not_utf8_message(name: str, data: bytes, offset: int) -> str:
    line = data.count(b"\n", 0, offset) + 1
    guess = "Latin-1/Windows-1252"
    try:
        data[:offset + 64].decode("cp1252")
    except UnicodeDecodeError:
        guess = "another single-byte encoding"
    return (f"{name}: line {line}: the file is not UTF-8 (looks like {guess}); re-export it as UTF-8 or pass "
            "--encoding (e.g. --encoding cp1252)")


def _split_header(line: str, delimiter: str) -> list[str]:
    try:
        return next(csv.reader(io.StringIO(line), delimiter=delimiter, quotechar='"'), [])
    except csv.Error:
        return []


def _norm(name: str) -> str:
    return unicodedata.normalize("NFC", name).strip().lower()


def _header_line(text: str) -> str:
    text = text.lstrip("\ufeff")
    end = text.find("\n")
    return (text if end < 0 else text[:end]).rstrip("\r")


def _choose_delimiter(header: str, known: set[str], asked: str, name: str) -> tuple[str, str | None]:
    """(delimiter, note) for the header line; refuses an explicit delimiter the header contradicts."""
    scores = {d: sum(_norm(f) in known for f in _split_header(header, d)) for d in DELIMITERS}
    best = max(DELIMITERS, key=lambda d: (scores[d], d == ","))
    if asked == "auto":
        if scores[best] == 0 or best == ",":
            return ",", None
        return best, f"read as {DELIMITERS[best]}-separated"
    if scores[best] > scores.get(asked, 0) and best != asked:
        shown = "\\t" if best == "\t" else best
        return asked, (f"{name}: the file looks {DELIMITERS[best]}-separated (its header splits into "
                       f"{scores[best]} known column names at '{shown}', {scores.get(asked, 0)} at the given "
                       f"delimiter); pass --delimiter auto, or re-export it comma-separated")
    return asked, None


def _private_copy(source, temp_dir: Path, encoding: str, name: str) -> Path:
    """Decode ``source`` (a binary stream) with ``encoding`` into a private UTF-8 file under ``temp_dir``."""
    fd, tmp = tempfile.mkstemp(prefix="takeup-src-", suffix=".csv", dir=temp_dir)
    os.fchmod(fd, 0o600)
    dec = codecs.getincrementaldecoder(encoding)("strict")
    line = 1
    try:
        with os.fdopen(fd, "wb") as out:
            while True:
                chunk = source.read(_COPY_CHUNK)
                final = not chunk
                try:
                    text = dec.decode(chunk, final=final)
                except UnicodeDecodeError as exc:
                    at = line + chunk.count(b"\n", 0, max(exc.start, 0))
                    raise IngestError(f"{name}: line {at}: a byte is not valid {encoding} text; check the "
                                      "encoding the file was exported with (--encoding)") from None
                out.write(text.encode("utf-8"))
                line += chunk.count(b"\n")
                if final:
                    break
    except (EOFError, OSError, zlib.error) as exc:
        os.unlink(tmp)
        if isinstance(exc, OSError) and exc.errno is not None:
            raise
        raise IngestError(f"{name}: the gzip data is truncated or damaged; send the file again") from None
    except BaseException:
        os.unlink(tmp)
        raise
    return Path(tmp)


def sniff_source(path: Path, known: set[str], max_columns: int, temp_dir: Path | None = None,
                 delimiter: str = "auto", encoding: str = "utf-8") -> SourcePlan:
    """Decide how to read ``path``; raises :class:`IngestError` with the reason for files it cannot take.

    Parameters
    ----------
    path : Path
        The file as sent.
    known : set of str
        Every accepted column name (normalised), to find the delimiter that splits the header.
    max_columns : int
        The most columns a file of the study can have; a longer header is refused at once.
    temp_dir : Path, optional
        A private directory for the UTF-8 copy of a gzip or non-UTF-8 file.
    delimiter : {"auto", ",", ";", "\\t", "|"}
        ``auto`` reads with the delimiter the header shows; an explicit one refuses a file that
        looks otherwise separated.
    encoding : str
        The text encoding of CSV files (default UTF-8; e.g. ``cp1252``, ``latin-1``, ``utf-16``).
    """
    name = path.name
    if delimiter != "auto" and delimiter not in DELIMITERS:
        raise ValueError(f"unknown delimiter {delimiter!r} (accepted: auto, ',', ';', tab, '|')")
    encoding = check_encoding_name(encoding)
    with open(path, "rb") as fh:
        magic = fh.read(8)
    if magic.startswith(b"PAR1"):
        return SourcePlan("parquet", path)
    refused = _container(magic + _peek(path, 4096), name)
    if refused:
        raise IngestError(refused)
    gz = magic.startswith(b"\x1f\x8b")
    try:
        head = _read_head(path, gz)
    except (EOFError, zlib.error, gzip.BadGzipFile):
        raise IngestError(f"{name}: the gzip data is truncated or damaged; send the file again") from None
    utf16 = head.startswith((codecs.BOM_UTF16_LE, codecs.BOM_UTF16_BE))
    if utf16 and not encoding.startswith("utf-16"):
        raise IngestError(f"{name}: the file is UTF-16 text; re-export it as UTF-8 or pass --encoding utf-16")
    if encoding == "utf-8" or not encoding.startswith("utf-16"):
        refused = _binary(head[:_HEAD], name)
        if refused:
            raise IngestError(refused)
    if encoding == "utf-8":
        bad = _first_bad_utf8(head)
        if bad is not None:
            raise IngestError(_not_utf8_message(name, head, bad))
        text = head.decode("utf-8", errors="ignore")
    else:
        text = head.decode(encoding, errors="replace")
    header = _header_line(text)
    if len(header.encode("utf-8")) >= MAX_HEADER_BYTES:
        raise IngestError(f"{name}: the first line is longer than {MAX_HEADER_BYTES >> 20} MiB; it cannot be a "
                          "header line (a CSV file starts with one line naming the columns)")
    chosen, note = _choose_delimiter(header, known, delimiter, name)
    if delimiter != "auto" and note:
        raise IngestError(note)
    n_fields = len(_split_header(header, chosen))
    if n_fields > max_columns:
        raise IngestError(f"{name}: the header has {n_fields:,} columns; a file of this study has at most "
                          f"{max_columns} (the record columns and the declared covariates)")
    if not gz and encoding == "utf-8":
        return SourcePlan("csv", path, chosen, note=note)
    if temp_dir is None:
        temp_dir = Path(tempfile.gettempdir())
    with _open_text_bytes(path, gz) as source:
        copy = _private_copy(source, temp_dir, encoding, name)
    what = ", ".join(x for x in ("gzip-compressed" if gz else "", f"decoded from {encoding}"
                                 if encoding != "utf-8" else "", note or "") if x)
    return SourcePlan("csv", copy, chosen, temporary=True, note=what)


def _peek(path: Path, n: int) -> bytes:
    with open(path, "rb") as fh:
        return fh.read(n)
