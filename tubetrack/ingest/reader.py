"""Low-level file reading: content hash, blank-line map, gzip integrity, format and DICOM sniffing,
and the DuckDB table-function call that reads a file as text cells.

The hash pass reads the bytes once (decompressing gzip on the fly) to get the sha256 of the file,
to find blank lines (DuckDB's CSV reader skips them, so they must be counted back to give true
line numbers) and to detect a truncated gzip stream before DuckDB sees it.
"""

from __future__ import annotations

import hashlib
import re
import zlib
from dataclasses import dataclass
from pathlib import Path

from tubetrack.ingest.layout import LOG_SUFFIXES

_CHUNK = 4 << 20
_BLANK = re.compile(rb"\n(?=\r?\n)")
GZIP_MAGIC = b"\x1f\x8b"


@dataclass(frozen=True)
class FileScan:
    """What one pass over a file's bytes found."""

    sha256: str
    size: int  # bytes on disk
    gzip: bool
    truncated: bool  # gzip stream ends early or is corrupt
    gzip_error: str
    lines: int  # physical lines of the (decompressed) text
    blank_lines: tuple[int, ...]  # 1-based numbers of empty lines
    head: bytes  # first bytes of the decompressed content
    data_bytes: int  # decompressed size
    has_quote: bool = True  # a '"' somewhere (a quoted cell may span lines)


def scan_file(path: Path) -> FileScan:
    """Hash a file and map its blank lines in one streaming pass [bytes in chunks of 4 MiB]."""
    h = hashlib.sha256()
    size = 0
    with path.open("rb") as fh:
        first = fh.read(_CHUNK)
        is_gz = first[:2] == GZIP_MAGIC
        dec = zlib.decompressobj(wbits=47) if is_gz else None
        nl_total = 0
        tail = b""
        blanks: set[int] = set()
        head = b""
        truncated = False
        gz_error = ""
        data_bytes = 0
        last_byte = b""
        quote = False
        chunk = first
        while chunk:
            h.update(chunk)
            size += len(chunk)
            if dec is not None and not truncated:
                try:
                    data = dec.decompress(chunk)
                    while dec.eof and dec.unused_data:  # concatenated gzip members
                        rest = dec.unused_data
                        dec = zlib.decompressobj(wbits=47)
                        data += dec.decompress(rest)
                except zlib.error as exc:
                    truncated, gz_error, data = True, str(exc), b""
            elif dec is None:
                data = chunk
            else:
                data = b""
            if data:
                if len(head) < 65536:
                    head += data[: 65536 - len(head)]
                buf = tail + data
                base_nl = nl_total - tail.count(b"\n")
                if _may_have_blank(buf):
                    for m in _BLANK.finditer(buf):
                        blanks.add(base_nl + buf.count(b"\n", 0, m.start() + 1) + 1)
                nl_total += data.count(b"\n")
                quote = quote or b'"' in data
                tail = buf[-2:]
                data_bytes += len(data)
                last_byte = data[-1:]
            chunk = fh.read(_CHUNK)
        if dec is not None and not truncated and not dec.eof:
            truncated, gz_error = True, "the gzip stream ends before its end marker"
    lines = nl_total + (1 if last_byte and last_byte != b"\n" else 0)
    # a trailing newline at the very end is not a blank line
    blanks = {b for b in blanks if b <= lines}
    return FileScan(
        sha256=h.hexdigest(),
        size=size,
        gzip=is_gz,
        truncated=truncated,
        gzip_error=gz_error,
        lines=lines,
        blank_lines=tuple(sorted(blanks)),
        head=head,
        data_bytes=data_bytes,
        has_quote=quote,
    )


class ScanAhead:
    """:func:`scan_file` of files on one background thread, in the order they are asked for,
    while the caller's thread waits in DuckDB (which releases the GIL, as hashlib does for large
    buffers). :meth:`get` gives a file's scan, waiting for it or scanning it then and there;
    errors (``OSError``) come out of :meth:`get` as from :func:`scan_file`."""

    def __init__(self) -> None:
        from concurrent.futures import Future, ThreadPoolExecutor

        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="tubetrack-scan")
        self._futures: dict[Path, Future[FileScan]] = {}

    def prefetch(self, paths: list[Path]) -> None:
        """Queue these files' scans (files already queued are not queued twice)."""
        for path in paths:
            if path not in self._futures:
                self._futures[path] = self._pool.submit(scan_file, path)

    def get(self, path: Path) -> FileScan:
        future = self._futures.pop(path, None)
        return future.result() if future is not None else scan_file(path)

    def close(self) -> None:
        for future in self._futures.values():
            future.cancel()
        self._futures.clear()
        self._pool.shutdown(wait=True)

    def __enter__(self) -> ScanAhead:
        return self

    def __exit__(self, *_exc: object) -> None:
        self.close()


def _may_have_blank(buf: bytes) -> bool:
    """True when ``buf`` holds ``\\n\\n`` or ``\\n\\r\\n`` (an empty line).

    Large chunks are checked with NumPy: a substring search for a pattern starting with the
    newline stops at every line end and took 2.1 s of the 2.6 s scan of a 890 MB CSV; the
    vectorised check takes 0.4 s.
    """
    if len(buf) < 65536:
        return b"\n\n" in buf or b"\n\r\n" in buf
    import numpy as np

    a = np.frombuffer(buf, dtype=np.uint8)
    nl = a == 10
    if bool((nl[:-1] & nl[1:]).any()):
        return True
    return bool((nl[:-2] & (a[1:-1] == 13) & nl[2:]).any())


def is_dicom(path: Path) -> bool:
    """True for DICOM Part 10 files (``DICM`` at bytes 128-131) and DICOMDIR."""
    if path.name.upper() == "DICOMDIR":
        return True
    try:
        with path.open("rb") as fh:
            fh.seek(128)
            return fh.read(4) == b"DICM"
    except OSError:
        return False


def base_suffix(path: Path) -> str:
    """Lower-case suffix without a trailing ``.gz`` (``a.csv.gz`` -> ``.csv``)."""
    name = path.name.lower()
    if name.endswith(".gz"):
        name = name[:-3]
    return Path(name).suffix


def is_log_name(path: Path) -> bool:
    return base_suffix(path) in LOG_SUFFIXES


def detect_format(path: Path, head: bytes, declared: str | None = None) -> str:
    """File format: ``csv`` | ``jsonl`` | ``parquet`` (from the profile, suffix, then content)."""
    if declared:
        return declared
    suf = base_suffix(path)
    if suf == ".parquet" or head[:4] == b"PAR1":
        return "parquet"
    if suf in (".jsonl", ".ndjson", ".json"):
        return "jsonl"
    stripped = head.lstrip(b"\xef\xbb\xbf \t\r\n")
    if stripped[:1] == b"{":
        return "jsonl"
    return "csv"


def header_line(head: bytes) -> str:
    """The first line of the text, for messages (BOM removed, undecodable bytes shown as �)."""
    first = head.split(b"\n", 1)[0].rstrip(b"\r")
    if first.startswith(b"\xef\xbb\xbf"):
        first = first[3:]
    return first.decode("utf-8", errors="replace")
