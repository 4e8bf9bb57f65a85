"""The independent record count of delimited text files: how many records a file holds, found from
its bytes without any CSV parser, and whether the engine's reader may read it exactly.

The fast path (readers/csv.py) trusts the engine's reader with a file only where this count and the
reader's agree and the file holds nothing that reader would read otherwise than the form's rules
say. A line break ends a record only outside quotes (RFC 4180 doubles a quote inside a quoted field,
which keeps the parity); blank lines are not records. Vectorised over blocks with numpy.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import dataclass, replace
from pathlib import Path
from typing import NamedTuple

import numpy as np

from cdcnorm.readers import streams

#: Block size of the independent record count: small, so its numpy buffers stay small too.
COUNT_BLOCK = 4 << 20


@dataclass(frozen=True)
class Counting:
    """How the record count reads a table's files (``forms.counting_of`` says, per form)."""

    #: the quote; None where nothing is quoted (COPY's text format, plain text)
    quote: str | None
    #: the enclosed form's delimiter: a backslash escapes a quote too, and the count also says
    #: whether the engine's reader reads every field as ``LOAD DATA`` does (``_EnclosedCheck``)
    escaping: str | None = None
    #: where nothing is quoted: a backslash may escape a line break (COPY's text format), which
    #: the engine's reader would take for a record's end; False for plain text
    breaks: bool = True
    #: where nothing is quoted and the lines end with LF: a CR before an LF is data, which the
    #: engine's reader may take for part of a CRLF line end and drop
    lf_only: bool = False

    def with_lines_ending(self, lf: bool) -> Counting:
        """These rules for a file whose lines end with LF (``lf``) or not."""
        return replace(self, lf_only=self.quote is None and lf)


class Counted(NamedTuple):
    """What the record count finds in a file."""

    #: data records (the header left out)
    records: int
    #: whether the engine's reader may read the file
    readable: bool
    #: blank lines (outside quotes): not records, and in no count but this one
    blank: int = 0


def count_records(path: Path, header: bool, how: Counting) -> Counted:
    """The number of data records by quote parity, independently of any CSV parser, and whether the
    engine's reader may read the file: its quotes balance, and ``how`` finds nothing that reader
    would read otherwise. A line break ends a record only outside quotes (RFC 4180 doubles a quote
    inside a quoted field, which keeps the parity); blank lines are not records. Vectorised over
    blocks."""
    return count_blocks(streams.blocks(path, COUNT_BLOCK), header, how)


class _EnclosedCheck:
    """What the record count finds of the enclosed form's backslashes, block by block (each block
    holds every backslash run it has whole, with the two bytes after it: ``_whole_runs``): which
    quotes a backslash escapes, and whether the engine's reader, which drops a backslash before any
    character and does not look at backslashes outside quotes, reads every field as ``LOAD DATA``
    does. It does where, inside quotes, no backslash escapes 0 b n r t Z or N and no escaped
    backslash comes before an N (``"\\\\N"`` would read as ``\\N``, which stands for NULL), and
    where, outside quotes, every backslash is a whole ``\\N`` cell."""

    def __init__(self, quote: int, delimiter: str) -> None:
        self.quote = quote
        self.delimiter = ord(delimiter)
        self.last = 10  # the byte before the block (a line start at the file's start)
        self.plain = True
        self.special = np.frombuffer(b"0bnrtZN", np.uint8)

    def unquote(self, buf: np.ndarray, isq: np.ndarray, parity: int, final: bool) -> None:
        """Clear in ``isq`` (1 at each quote of ``buf``) the quotes a backslash escapes, and check the
        block's backslashes; ``parity``: of the unescaped quotes before the block. Backslashes are
        few: their runs are found among their positions, not over the block."""
        starts, ends, nxt, odd = _backslash_runs(buf)
        if len(starts):
            isq[ends[odd & (nxt == self.quote)] + 1] = 0  # an odd run escapes the quote after it
            if self.plain:
                # the quote parity before each run: no quote stands at a run's start, a backslash
                before = np.bitwise_xor.accumulate(
                    np.bitwise_xor.reduceat(isq, np.concatenate(([0], starts)))
                )
                inside = (before[:-1] ^ parity) & 1 == 1
                self._check(buf, starts, ends, nxt, odd, inside, final)
        if len(buf):
            self.last = int(buf[-1])

    def _check(
        self,
        buf: np.ndarray,
        starts: np.ndarray,
        ends: np.ndarray,
        nxt: np.ndarray,
        odd: np.ndarray,
        inside: np.ndarray,
        final: bool,
    ) -> None:
        n = len(buf)
        special = np.isin(nxt, self.special)
        if np.any(inside & special & (odd | (nxt == ord("N")))):
            self.plain = False
        out = ~inside
        if out.any():
            s, e, c = starts[out], ends[out], nxt[out]
            before = np.where(s > 0, buf[np.maximum(s - 1, 0)], self.last)
            beyond = np.where(e + 2 < n, buf[np.minimum(e + 2, n - 1)], -1)
            ends_cell = (beyond == self.delimiter) | (beyond == 10) | (beyond == 13) | (beyond == -1)
            starts_cell = (before == self.delimiter) | (before == 10) | (before == 13)
            null = (s == e) & (c == ord("N")) & starts_cell & ends_cell
            if not null.all():
                self.plain = False
        if not final and ends[-1] + 2 >= n:  # a run cut at ``_whole_runs``' limit
            self.plain = False


def _backslash_runs(buf: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """The block's runs of backslashes: where each starts and ends, the byte after it (-1 where the
    block ends), and whether it is odd (its last backslash escapes that byte). Backslashes are few:
    the runs are found among their positions, not over the block."""
    bpos = np.flatnonzero(buf == 92)
    cut = np.flatnonzero(np.diff(bpos) != 1)
    starts = bpos[np.concatenate(([0], cut + 1))] if len(bpos) else bpos
    ends = bpos[np.concatenate((cut, [len(bpos) - 1]))] if len(bpos) else bpos
    after = ends + 1
    n = len(buf)
    nxt = np.where(after < n, buf[np.minimum(after, n - 1)], -1)
    return starts, ends, nxt, (ends - starts) % 2 == 0


def _whole_runs(chunks: Iterable[bytes], limit: int) -> Iterator[tuple[bytes, bool]]:
    """The blocks cut again so that each holds its backslash runs whole with the two bytes after
    them, and whether it is the last; a run longer than ``limit`` bytes is cut anyway (the check
    then finds its end beyond the block, and the file is not plain)."""
    held = b""
    for chunk in chunks:
        data = held + chunk if held else chunk
        cut = len(data)
        while cut > 0 and (b := data.rfind(b"\\", max(0, cut - 3), cut)) >= 0:
            cut = b
        if cut == 0 and len(data) > limit:
            cut = len(data)
        held = data[cut:]
        if cut:
            yield data[:cut], False
    yield held, True


def count_blocks(chunks: Iterable[bytes], header: bool, how: Counting) -> Counted:
    """``count_records`` over the bytes of a file given in blocks."""
    quote, escaping, lf_only = how.quote, how.escaping, how.lf_only
    check = _EnclosedCheck(ord(quote), escaping) if escaping is not None and quote is not None else None
    # the forms a backslash escapes in see each run of backslashes whole, in one block
    breaks = how.breaks and quote is None
    whole = check is not None or breaks
    blocks = _whole_runs(chunks, 4 * COUNT_BLOCK) if whole else ((c, False) for c in chunks)
    q = -1 if quote is None else ord(quote)  # no byte equals -1: no quote toggles the parity
    escaped = False  # a backslash escapes a line break (COPY's text format)
    parity = 0
    last_end = -1
    pos = 0
    last_byte = 10
    count = 0
    blank = 0
    cr_data = False  # a CR before an LF, in a file of LF line ends (``lf_only``)
    for chunk, final in blocks:
        buf = np.frombuffer(chunk, dtype=np.uint8)
        nl = np.flatnonzero(buf == 10)
        if lf_only and not cr_data and len(nl):
            cr_data = bool(np.any(buf[nl[nl > 0] - 1] == 13)) or (nl[0] == 0 and last_byte == 13)
        isq = (buf == q).view(np.uint8) if q >= 0 else np.zeros(len(buf), np.uint8)
        if check is not None:
            check.unquote(buf, isq, parity, final)
        if breaks and not escaped:
            _, ends, nxt, odd = _backslash_runs(buf)
            # a run cut at ``_whole_runs``' limit may escape what the next block starts with
            escaped = bool(np.any(odd & ((nxt == 10) | (nxt == 13)))) or (
                not final and len(ends) > 0 and ends[-1] + 2 >= len(buf)
            )
        if len(nl):
            starts = np.concatenate(([0], nl + 1))
            if starts[-1] == len(buf):
                starts = starts[:-1]
            acc = np.bitwise_xor.accumulate(np.bitwise_xor.reduceat(isq, starts)) ^ parity
            ends = nl[acc[: len(nl)] == 0] + pos  # the line breaks outside quotes
            parity = int(acc[-1])
        else:
            ends = nl
            parity ^= int(np.count_nonzero(isq) & 1)
        if len(ends):
            prev = np.empty_like(ends)
            prev[0] = last_end
            prev[1:] = ends[:-1]
            gap = ends - prev
            at = ends - 1 - pos
            before = np.where(at >= 0, buf[np.maximum(at, 0)], last_byte)
            empty = (gap == 1) | ((gap == 2) & (before == 13))
            blanks = int(np.count_nonzero(empty))
            blank += blanks
            count += len(ends) - blanks
            last_end = int(ends[-1])
        pos += len(buf)
        if len(buf):
            last_byte = int(buf[-1])
    rest = pos - 1 - last_end  # bytes after the last record's line break
    if rest > 1 or (rest == 1 and last_byte != 13):
        count += 1
    plain = check is None or check.plain
    readable = parity == 0 and not escaped and plain and not cr_data
    return Counted(count - (1 if header and count else 0), readable, blank)
