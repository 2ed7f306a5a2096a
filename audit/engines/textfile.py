"""Text files for an SQL engine, read by the in-memory intake's rules.

* encodings: UTF-8 (with or without a byte-order mark) is read by the engine
  itself; any other codec (UTF-16/32 with a byte-order mark, or one given with
  ``encoding=``) is transcoded to a temporary UTF-8 file in 1 MiB chunks (never
  the whole file in memory), with the in-memory intake's decoding errors;
* the delimiter is sniffed from the same first 65,536 characters, and the
  header is read and checked (unique names) as the in-memory intake does;
* row numbers: the engine numbers data records in file order; :meth:`TextFile.lines`
  turns record numbers into the file's line numbers (the header is line 1;
  quoted fields spanning lines count every line), streaming the file.
"""

from __future__ import annotations

import codecs
import csv
import io
import os
import shutil
import tempfile

import numpy as np

from .. import intake
from ..errors import DataFileError

__all__ = ["TextFile"]

CHUNK = 1 << 20
SAMPLE_CHARS = 65536


def _check_utf8(path: str) -> None:
    """Raise the in-memory intake's error when ``path`` is not valid UTF-8 (streamed)."""
    dec = codecs.getincrementaldecoder("utf-8")("strict")
    with open(path, "rb") as fh:
        head = fh.read(4096)
        fh.seek(0)
        pos = 0
        while True:
            chunk = fh.read(CHUNK)
            final = not chunk
            try:
                dec.decode(chunk, final)
            except UnicodeDecodeError as exc:
                # the decoder reports offsets within its buffer (this chunk plus up to 3 pending bytes)
                pending = len(exc.object) - len(chunk)
                at = pos - pending + exc.start
                # count newlines before the bad byte exactly (a second, streamed pass)
                fh.seek(0)
                count, left = 0, at
                while left > 0:
                    part = fh.read(min(CHUNK, left))
                    count += part.count(b"\n")
                    left -= len(part)
                fh.seek(at)
                bad = fh.read(1)[0]
                raise intake.not_utf8_error(path, head, bad, count + 1) from None
            if final:
                return
            pos += len(chunk)


def _transcode(path: str, codec: str, given: bool, tmpdir: str, newlines: bool = False) -> str:
    """Decode ``path`` with ``codec`` in chunks into a UTF-8 file in ``tmpdir`` (leading
    byte-order marks dropped; with ``newlines`` every CR LF and lone CR written as LF, for
    files that mix line ends); the in-memory intake's error on an undecodable byte."""
    out = os.path.join(tmpdir, "data.csv")
    dec = codecs.getincrementaldecoder(codec)("strict")
    first = True
    pos = 0
    held = ""
    with open(path, "rb") as fh, open(out, "w", encoding="utf-8", newline="") as wh:
        while True:
            chunk = fh.read(CHUNK)
            final = not chunk
            try:
                text = dec.decode(chunk, final)
            except UnicodeDecodeError as exc:
                if not given:
                    raise intake.bad_bom_error(path, codec) from None
                pending = len(exc.object) - len(chunk)
                at = pos - pending + exc.start
                fh.seek(at)
                raise intake.undecodable_error(path, codec, fh.read(1)[0], at) from None
            if first and text:
                text = text.lstrip("\ufeff")
                first = False
            if newlines:
                text = held + text
                held = text[-1:] if (text.endswith("\r") and not final) else ""
                text = text[:len(text) - len(held)].replace("\r\n", "\n").replace("\r", "\n")
            wh.write(text)
            if final:
                return out
            pos += len(chunk)


class TextFile:
    """One delimited text file as the engine reads it (see the module docstring)."""

    def __init__(self, path: str, *, encoding: str | None = None):
        self.path = path                      # as the user gave it (for messages)
        self.tmpdir: str | None = None
        with open(path, "rb") as fh:
            raw = fh.read(SAMPLE_CHARS)
        bom = intake.bom_encoding(raw[:4])
        codec = self.encoding = encoding or bom or "utf-8"
        norm = codecs.lookup(codec).name
        lf = raw.replace(b"\r\n", b"").count(b"\n") + raw.replace(b"\r\n", b"").count(b"\r")
        mixed = b"\r\n" in raw and lf > 0   # the engine's parser needs one kind of line end
        if mixed or not (norm in ("utf-8", "utf-8-sig") and (encoding is None or norm == "utf-8")):
            self.tmpdir = tempfile.mkdtemp(prefix="twa-engine-")
            try:
                self.read_path = _transcode(path, codec, encoding is not None or bom is None, self.tmpdir,
                                            newlines=mixed)
            except DataFileError:
                if encoding is None and bom is None:
                    _check_utf8(path)         # the in-memory intake's message for text that is not UTF-8
                raise
            self.utf8_native = False
        else:
            self.read_path = path             # the engine reads UTF-8 itself
            self.utf8_native = True
        sample = self._sample()
        suffix = os.path.splitext(path)[1].lower()
        self.delimiter = intake.sniff_delimiter(path, sample, suffix)
        if self.delimiter == r"\s+":
            raise DataFileError(f"{path}: engine duckdb reads delimited text (comma, tab, ';' or '|'), but this "
                                "file's columns are separated by runs of spaces; use --engine memory, or save it "
                                "with one delimiter")
        names, skip = self._header(sample)
        self.names = intake.header_names(names, path)
        self.skip = skip                      # physical lines up to and including the header
        self.quoted = '"' in sample           # a quote in the first 64 KiB (Spark's multi-line reader)
        self.parallel = True                  # False for quoted line breaks (DuckDB's parallel reader)

    # -- reading ---------------------------------------------------------------------------------

    def _text_stream(self):
        enc = "utf-8-sig" if self.utf8_native else "utf-8"
        return open(self.read_path, "r", encoding=enc, errors="replace", newline="")

    def _sample(self) -> str:
        with self._text_stream() as fh:
            return fh.read(SAMPLE_CHARS)

    def _header(self, sample: str) -> tuple[list[str], int]:
        reader = csv.reader(io.StringIO(sample, newline=""), delimiter=self.delimiter, skipinitialspace=True)
        for rec in reader:
            if any(v.strip() for v in rec):
                return rec, reader.line_num
        raise DataFileError(f"{self.path}: the file is empty; expected a header line and data rows")

    def duckdb_source(self, sql_str, glob_escape) -> str:
        cols = "{" + ", ".join(f"{sql_str(n)}: 'VARCHAR'" for n in self.names) + "}"
        return (f"read_csv({sql_str(glob_escape(self.read_path))}, header = false, skip = {int(self.skip)}, "
                f"delim = {sql_str(self.delimiter)}, quote = '\"', escape = '\"', columns = {cols}, "
                "auto_detect = false, null_padding = true, strict_mode = true, all_varchar = true"
                + ("" if self.parallel else ", parallel = false")
                + (", encoding = 'utf-8'" if self.utf8_native else "") + ")")

    def check_decodable(self) -> None:
        if self.utf8_native:
            _check_utf8(self.path)

    def lines(self, records: list[int]) -> dict[int, int]:
        """File line of each data record number (1-based, in file order, the empty lines the
        engine skips not counted), streaming the file up to the largest one."""
        want = sorted(set(int(r) for r in records))
        if not want:
            return {}
        out = self._lines_fast(want)
        return out if out is not None else self._lines_csv(want)

    def _lines_fast(self, want):
        """Lines of a file without quotes or bare carriage returns: a record is a non-empty line."""
        out: dict[int, int] = {}
        todo = iter(want)
        nxt = next(todo)
        line = 0           # physical lines passed so far
        rec = 0            # records passed so far
        carry = b""
        with open(self.read_path, "rb") as fh:
            while True:
                chunk = fh.read(CHUNK)
                data = carry + chunk
                if b'"' in data:
                    return None
                cut = data.rfind(b"\n") + 1 if chunk else len(data)
                block, carry = data[:cut], data[cut:]
                if b"\r" in block.replace(b"\r\n", b""):
                    return None
                arr = np.frombuffer(block, np.uint8)
                nl = np.flatnonzero(arr == 10)
                ends = np.append(nl, arr.size) if (not chunk and arr.size and arr[-1] != 10) else nl
                starts = np.concatenate([[0], nl + 1])[:ends.size]
                length = ends - starts
                cr = np.zeros(ends.size, bool)
                has = ends > starts
                cr[has] = arr[ends[has] - 1] == 13
                length = length - cr
                phys = line + np.arange(1, ends.size + 1)
                keep = (phys > self.skip) & (length > 0)
                recno = rec + np.cumsum(keep)
                while nxt is not None and (recno.size and nxt <= recno[-1]):
                    i = int(np.searchsorted(recno, nxt))
                    out[nxt] = int(phys[i])
                    nxt = next(todo, None)
                if nxt is None:
                    return out
                line += ends.size
                rec = int(recno[-1]) if recno.size else rec
                if not chunk:
                    return out

    def _lines_csv(self, want):
        out: dict[int, int] = {}
        todo = iter(want)
        nxt = next(todo)
        with self._text_stream() as fh:
            reader = csv.reader(fh, delimiter=self.delimiter, skipinitialspace=True)
            prev, rec = 0, 0
            for row in reader:
                start = prev + 1
                prev = reader.line_num
                if prev <= self.skip or not row:
                    continue
                rec += 1
                if rec == nxt:
                    out[rec] = start
                    nxt = next(todo, None)
                    if nxt is None:
                        break
        return out

    def close(self) -> None:
        if self.tmpdir:
            shutil.rmtree(self.tmpdir, ignore_errors=True)
            self.tmpdir = None

