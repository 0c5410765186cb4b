"""Streaming a capture file into lines, with the limits that keep one hostile file harmless.

A capture file is read in blocks, never whole: memory is bounded by a block and one line, not by
the file. The limits (documented in docs/capture-format.md, "Limits"):

* a line longer than ``MAX_LINE_BYTES`` is rejected without being held whole (its first bytes are
  kept as the quarantine excerpt, the rest is skipped up to the next newline);
* gzip input that inflates by more than ``MAX_INFLATE_RATIO`` to 1 (once past
  ``INFLATE_RATIO_FLOOR`` bytes) stops that file with a reason: real captures inflate 20-35:1
  (hex of sectors that are mostly zeros, measured on the demo fleet), a "bomb" thousands to one;
* more than ``MAX_BLANK_LINES`` blank lines in a file are reported (a capture program never
  writes them); they are counted in blocks, never split into lines one by one.

A gzip file may hold several members (``cat a.gz b.gz``, RFC 1952 section 2.2). Damage inside a
member keeps the lines before it: they are handed out as they are inflated.
"""

from __future__ import annotations

import os
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO, Iterator

#: A valid line is at most ~9.5 kB (an NVMe capture: 8192 + 1024 hex digits and a few fields).
MAX_LINE_BYTES = 64 * 1024
#: The most of a bad line kept in quarantine (the longest valid line fits whole).
EXCERPT_BYTES = 16 * 1024
MAX_INFLATE_RATIO = 200
INFLATE_RATIO_FLOOR = 16 * 2**20
MAX_BLANK_LINES = 1000
#: Bytes read from a plain file, or inflated from gzip, per step.
BLOCK_BYTES = 1 << 20
#: Bytes read per step when looking for the start of a line (a valid line is under 10 kB).
SCAN_BYTES = 16 * 1024
#: Compressed bytes fed to the inflater per step: small, so that when a member turns out damaged
#: (zlib finds it at once or at the member's CRC) the lines inflated before are already handed out.
GZIP_STEP_BYTES = 2048


class FileStopped(Exception):
    """The rest of a file cannot be read; the lines handed out before stay good."""


@dataclass(frozen=True)
class OversizeLine:
    """A line over ``MAX_LINE_BYTES``: its length and first ``EXCERPT_BYTES`` bytes only, and
    whether every byte of it so far was white space (then it is a blank line, however long)."""

    length: int
    head: bytes
    blank: bool = False

    def extended(self, more: bytes) -> "OversizeLine":
        """The same line with ``more`` bytes after it (the head grows up to ``EXCERPT_BYTES``)."""
        head = self.head if len(self.head) >= EXCERPT_BYTES else (self.head + more[:EXCERPT_BYTES])[:EXCERPT_BYTES]
        return OversizeLine(self.length + len(more), head, self.blank and is_blank(more))


def is_blank(data: bytes) -> bool:
    """Only ASCII white space (or nothing): what ``data.strip()`` would empty, found without
    copying (``isspace`` stops at the first other byte, the first byte of any capture line)."""
    return not data or data.isspace()


def is_gzip_name(path: Path) -> bool:
    return path.name.lower().endswith(".gz")


def is_utf8_text(text: str) -> bool:
    """False for text holding a lone surrogate: a byte that was not UTF-8 (read with
    ``surrogateescape``) or a ``\\udXXX`` escape, neither of which can be stored."""
    try:
        text.encode("utf-8")
        return True
    except UnicodeEncodeError:
        return False


def display_name(path: Path | str) -> str:
    """The file name as text that can always be stored and printed: a byte that is not UTF-8
    (kept by the OS as a lone surrogate) becomes the visible escape ``\\xNN``."""
    text = os.fspath(path)
    if isinstance(text, bytes):
        text = os.fsdecode(text)
    if is_utf8_text(text):
        return text
    return os.fsencode(text).decode("utf-8", errors="backslashreplace")


def excerpt(line: bytes | OversizeLine) -> str:
    """A bad line as quarantine text: at most ``EXCERPT_BYTES`` bytes, undecodable bytes replaced
    (never dropped silently), a cut line marked with its full length."""
    if isinstance(line, OversizeLine):
        head, length = line.head, line.length
    else:
        head, length = line[:EXCERPT_BYTES], len(line)
    text = head.rstrip(b"\r").decode("utf-8", errors="replace")
    if length > len(head):
        text += f" [cut: {length} bytes in all]"
    return text


class CaptureLines:
    """The lines of one capture file, numbered from ``first_line``, read block by block.

    Iterating yields ``(number, line)`` with ``line`` the bytes without the newline, or an
    :class:`OversizeLine`; blank lines are counted in ``blank_lines``, not yielded. A problem
    that ends the file raises :class:`FileStopped` after the good lines. ``position`` is the
    (uncompressed) byte offset just past the last line handed out, and ``start`` resumes there.

    A plain (not gzip) file can be read as byte ranges by several readers at once: with ``stop``
    the reader keeps to the lines that *start* in ``[start, stop)``. Both ends are moved to the
    start of a line (:func:`line_start_at`), so neighbouring ranges share no line and miss none.
    ``disk_position`` is how far into the file on disk reading got (compressed bytes for gzip),
    for progress shown by bytes.
    """

    def __init__(self, path: Path, start: int = 0, first_line: int = 1, stop: int | None = None,
                 disk_position: int = 0):
        if stop is not None and is_gzip_name(path):
            raise ValueError("a gzip stream cannot be read from the middle: no byte ranges")
        self.path = path
        self.start = start
        self.stop = stop
        self.position = start
        self.next_line = first_line
        self.blank_lines = 0
        self._disk_position = disk_position
        self._counted = self.disk_position  # bytes up to here were reported by new_bytes()

    @property
    def disk_position(self) -> int:
        return self._disk_position if is_gzip_name(self.path) else self.position

    def new_bytes(self) -> int:
        """Bytes on disk read since the last call (a range counts from its first line's start)."""
        moved = max(0, self.disk_position - self._counted)
        self._counted += moved
        return moved

    def __iter__(self) -> Iterator[tuple[int, bytes | OversizeLine]]:
        with self.path.open("rb") as fh:
            if is_gzip_name(self.path):
                yield from self._split(self._tracked(_inflated_blocks(fh), fh), skip=self.start)
                return
            if self.start:
                self.start = self.position = self._counted = line_start_at(fh, self.start)
            end = None if self.stop is None else line_start_at(fh, self.stop)
            fh.seek(self.start)
            yield from self._split(_plain_blocks(fh, self.start, end), skip=0)

    def _tracked(self, blocks: Iterator[bytes], fh: BinaryIO) -> Iterator[bytes]:
        for block in blocks:
            self._disk_position = max(self._disk_position, fh.tell())
            yield block

    def _split(self, blocks: Iterator[bytes], skip: int) -> Iterator[tuple[int, bytes | OversizeLine]]:
        # Invariant: ``position + len(carry)`` bytes are consumed; ``carry`` is an unfinished line.
        carry = b""
        oversize: OversizeLine | None = None  # the line being skipped, when over the limit
        for block in blocks:
            if skip:
                cut = min(skip, len(block))
                block, skip = block[cut:], skip - cut
            if oversize is not None:
                end = block.find(b"\n")
                rest = block if end < 0 else block[:end]
                oversize = oversize.extended(rest)
                if end < 0:
                    continue
                line, oversize = oversize, None
                self.position += line.length + 1
                if line.blank:
                    self.blank_lines += 1
                    self.next_line += 1
                else:
                    yield self._number(), line
                block = block[end + 1:]
            if is_blank(block) and is_blank(carry):
                # only blank lines (a "bomb of newlines" is this): counted, not split
                last = block.rfind(b"\n")
                if last >= 0:
                    count = block.count(b"\n")
                    self.blank_lines += count
                    self.next_line += count
                    self.position += len(carry) + last + 1
                    carry = block[last + 1:]
                else:
                    carry += block
            else:
                lines = (carry + block).split(b"\n")
                carry = lines.pop()
                for line in lines:
                    self.position += len(line) + 1
                    if is_blank(line):
                        self.blank_lines += 1
                        self.next_line += 1
                    elif len(line) > MAX_LINE_BYTES:
                        yield self._number(), OversizeLine(len(line), line[:EXCERPT_BYTES])
                    else:
                        yield self._number(), line
            if len(carry) > MAX_LINE_BYTES:
                oversize, carry = OversizeLine(len(carry), carry[:EXCERPT_BYTES], is_blank(carry)), b""
        if oversize is not None:
            self.position += oversize.length
            if oversize.blank:
                self.blank_lines += 1
                self.next_line += 1
            else:
                yield self._number(), oversize
        elif not is_blank(carry):  # a last line without its newline is still a line
            self.position += len(carry)
            yield self._number(), carry

    def _number(self) -> int:
        number = self.next_line
        self.next_line += 1
        return number


def line_start_at(fh: BinaryIO, offset: int) -> int:
    """The offset of the first line of a plain file starting at or after ``offset``: ``offset``
    itself at 0 or just after a newline, else just past the next newline (the end of the file
    when there is none). Reads forward block by block: a long line costs time, not memory."""
    if offset <= 0:
        return 0
    fh.seek(offset - 1)
    at = offset - 1
    while block := fh.read(SCAN_BYTES):
        found = block.find(b"\n")
        if found >= 0:
            return at + found + 1
        at += len(block)
    return at


def _plain_blocks(fh: BinaryIO, start: int, end: int | None) -> Iterator[bytes]:
    """Blocks of a plain file from ``start`` (the file's position) up to ``end`` (None: its end)."""
    left = None if end is None else end - start
    while left is None or left > 0:
        block = fh.read(BLOCK_BYTES if left is None else min(BLOCK_BYTES, left))
        if not block:
            return
        if left is not None:
            left -= len(block)
        yield block


def _inflated_blocks(fh: BinaryIO) -> Iterator[bytes]:
    """The inflated bytes of every gzip member in turn, at most ``BLOCK_BYTES`` per step."""
    inflater = zlib.decompressobj(16 + zlib.MAX_WBITS)
    read_in = inflated = 0
    pending = b""
    while True:
        if not pending:
            pending = fh.read(GZIP_STEP_BYTES)
            read_in += len(pending)
            if not pending:
                break
        try:
            out = inflater.decompress(pending, BLOCK_BYTES)
        except zlib.error as exc:
            raise FileStopped(f"damaged gzip data: {exc}") from None
        pending = inflater.unconsumed_tail
        inflated += len(out)
        if inflated > INFLATE_RATIO_FLOOR and inflated > MAX_INFLATE_RATIO * read_in:
            raise FileStopped(
                f"inflates more than {MAX_INFLATE_RATIO}:1 ({inflated} bytes from the first "
                f"{read_in}): stopped, not a capture file")
        if out:
            yield out
        if inflater.eof:
            pending = inflater.unused_data.lstrip(b"\0")  # members may be padded with NULs
            while not pending:
                more = fh.read(GZIP_STEP_BYTES)
                if not more:
                    return
                read_in += len(more)
                pending = more.lstrip(b"\0")
            inflater = zlib.decompressobj(16 + zlib.MAX_WBITS)
    if read_in:  # the input ended inside a member: a copy cut short
        raise FileStopped("gzip data ends early (truncated file)")
