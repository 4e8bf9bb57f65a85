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
#: The most bytes of one record the count keeps from block to block to count a delimiter of several
#: bytes in it; a longer record that ends with a null token sends its file the careful way.
WIDE_TAIL = 1 << 20


@dataclass(frozen=True)
class Counting:
    """How the record count reads a table's files (``forms.counting_of`` says, per form)."""

    #: the quote; None where nothing is quoted (COPY's text format, plain text)
    quote: str | None
    #: the enclosed form's delimiter: a backslash escapes a quote too, and the count also says
    #: whether the engine's reader reads every field as ``LOAD DATA`` does (``_EnclosedCheck``)
    escaping: str | None = None
    #: where nothing is quoted: a backslash may escape a line break or the delimiter (COPY's text
    #: format), which the engine's reader would take for a record's end or a field's; False for
    #: plain text
    breaks: bool = True
    #: where nothing is quoted and the lines end with LF: a CR before an LF is data, which the
    #: engine's reader may take for part of a CRLF line end and drop
    lf_only: bool = False
    #: the file's number of columns and its delimiter (``_TrailingNulls`` counts the fields of the
    #: records that end with a null token; COPY's text format may escape the delimiter)
    columns: int = 0
    delimiter: bytes = b""
    #: the unquoted null tokens the engine's reader is given, as the file's bytes
    null_tokens: tuple[bytes, ...] = ()

    def with_lines_ending(self, lf: bool) -> Counting:
        """These rules for a file whose lines end with LF (``lf``) or not."""
        return replace(self, lf_only=self.quote is None and lf)

    def with_nulls(self, columns: int, delimiter: bytes, tokens: tuple[bytes, ...]) -> Counting:
        """These rules for a file of ``columns`` columns separated by ``delimiter`` whose unquoted
        ``tokens`` the engine's reader reads as NULL."""
        return replace(self, columns=columns, delimiter=delimiter, null_tokens=tokens)


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


class _SpacedQuotes:
    """Whether a space stands just outside a quote: before an opening one or after a closing one
    (`` "s"``, ``"s" ``). RFC 4180 has no such field; the engine's reader takes one space before an
    opening quote and any after a closing one for padding and drops them (`` "s" `` reads as ``s``,
    ``"a" "b"`` as ``a b``; a test shows it), where the careful path keeps an unquoted field as
    written and finds text after a closing quote broken. Such a file goes the careful path. Only
    the quotes beside a space are looked at (a quoted text holds a few), each opening where an even
    number of quotes comes before it; the masks reuse one buffer (new ones cost page faults)."""

    def __init__(self) -> None:
        self.last = 10  # the byte before the block
        self.closing = False  # the block before ended with a closing quote
        self.found = False
        self.work = np.empty(0, bool)

    def block(self, buf: np.ndarray, isq: np.ndarray, parity: int, parity_after: int) -> None:
        """Look at ``buf`` (``isq``: 1 at each quote that counts; ``parity``: of those before it,
        ``parity_after``: of those up to its end)."""
        n = len(buf)
        if self.found or not n:
            return
        if self.closing and buf[0] == 32:
            self.found = True
            return
        if len(self.work) < 2 * n:
            self.work = np.empty(2 * n, bool)
        space, pair = self.work[:n], self.work[n : 2 * n - 1]
        quote = isq.view(bool)
        np.equal(buf, 32, out=space)
        spaced = [np.flatnonzero(np.logical_and(space[:-1], quote[1:], out=pair)) + 1]
        if quote[0] and self.last == 32:
            spaced.append(np.zeros(1, np.int64))
        spaced.append(np.flatnonzero(np.logical_and(quote[:-1], space[1:], out=pair)))
        opening, closing = np.concatenate(spaced[:-1]), spaced[-1]
        if len(opening) or len(closing):
            at = np.unique(np.concatenate(([0], opening, closing)))
            # the parity of the quotes before each: of the runs between them, accumulated
            runs = np.bitwise_xor.accumulate(np.bitwise_xor.reduceat(isq, at))
            before = np.concatenate(([0], runs[:-1])) ^ parity
            if np.any(before[np.searchsorted(at, opening)] == 0) or np.any(
                before[np.searchsorted(at, closing)] == 1
            ):
                self.found = True
                return
        self.closing = bool(quote[-1]) and parity_after == 0
        self.last = int(buf[-1])


class _TrailingNulls:
    """Whether any record that ends with an unquoted null token holds more fields than the file has
    columns. The engine's reader drops a record's trailing fields beyond the columns without a word
    where they are all unquoted null tokens (``I,1,1,bolt,`` under four columns with the null token
    "" reads as ``I,1,1,bolt``, strict mode or not; a test shows it), so such a file goes the
    careful path, which finds the record malformed. Only the records that end so are counted: the
    delimiters outside quotes of a block are found when some record of the block ends so, else only
    those after the block's last record end (where a record may go on in the next block). A
    delimiter of several bytes (plain text's ``|~|``) is counted in each such record's bytes as the
    engine's reader finds it, left to right without overlaps (``bytes.count``); in a quoted form,
    such a record sends its file the careful way uncounted."""

    def __init__(self, how: Counting, header: bool) -> None:
        self.columns = how.columns
        self.delimiter = how.delimiter
        self.ends = [np.frombuffer(how.delimiter + t, np.uint8) for t in how.null_tokens]
        self.keep = max(len(e) for e in self.ends) + 1
        self.before = np.zeros(0, np.uint8)  # the last bytes of the blocks before
        self.carry = 0  # delimiters outside quotes since the last record's end
        self.skip = 1 if header else 0  # the header row, which is no record to check
        self.over = False
        self.wide = len(how.delimiter) > 1
        self.quoted = how.quote is not None
        self.tail = b""  # (a wide delimiter) the bytes since the last record's end, up to WIDE_TAIL
        self.long = False  # (a wide delimiter) the record going on is longer than WIDE_TAIL

    def block(
        self, buf: np.ndarray, isq: np.ndarray, parity: int, breaks: np.ndarray, empty: np.ndarray
    ) -> None:
        """Check the records that end in ``buf``: ``breaks`` are the line breaks outside quotes in
        it, ``empty`` says which end a blank line, ``parity`` is of the quotes before the block."""
        if self.over:
            return
        ext = np.concatenate((self.before, buf)) if len(self.before) else buf
        shift = len(ext) - len(buf)
        line = np.flatnonzero(~empty)  # the records' places among the breaks
        if self.skip and len(line):
            line = line[self.skip :]
            self.skip = 0
        ends = breaks[line] + shift
        cr = (ends > 0) & (ext[np.maximum(ends - 1, 0)] == 13)
        hit = self._ending(ext, ends - cr)  # the text of a record ends before its CR
        starts = np.concatenate(([0], breaks[:-1] + 1))
        if hit.any():
            rec = line[hit]
            if self.wide:
                self.over = self.quoted or self._wide_over(buf, starts[rec], breaks[rec])
            else:
                fields = self._fields(buf, isq, parity, starts[rec], breaks[rec])
                fields += np.where(rec == 0, self.carry, 0)  # the block's first record began before it
                self.over = bool(np.any(fields > self.columns))
            if self.over:
                return
        tail = int(breaks[-1]) + 1 if len(breaks) else 0
        if self.wide:
            self._keep_tail(buf[tail:].tobytes(), bool(len(breaks)))
        else:
            n = len(self._outside(buf[tail:], isq[tail:], 0 if len(breaks) else parity))
            self.carry = n if len(breaks) else self.carry + n
        self.before = ext[-self.keep :].copy()

    def _wide_over(self, buf: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> bool:
        """Whether a record of ``buf`` from ``lo`` to ``hi`` holds too many fields: the places where
        the delimiter's bytes all match, counted per record, where no two are closer than its
        length (they never are unless the delimiter's end repeats its start, as ``||`` in ``|||``);
        else, and for the record that started in a block before, its bytes counted one by one."""
        k, places = len(self.delimiter), max(len(buf) - len(self.delimiter) + 1, 0)
        match = buf[:places] == self.delimiter[0]
        for j in range(1, k):
            match &= buf[j : places + j] == self.delimiter[j]
        at = np.flatnonzero(match)
        inside = lo > 0
        if not np.any(np.diff(at) < k):
            fields = np.searchsorted(at, hi[inside] - k + 1) - np.searchsorted(at, lo[inside]) + 1
            if np.any(fields > self.columns):
                return True
            lo, hi = lo[~inside], hi[~inside]
        return self._counted_over(buf, lo, hi)

    def _counted_over(self, buf: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> bool:
        """``_wide_over`` by counting each record's bytes (``bytes.count``: left to right, no
        overlaps), the one that starts the block with the bytes before it."""
        for a, b in zip(lo.tolist(), hi.tolist(), strict=True):
            if a == 0 and self.long:
                return True
            text = (self.tail if a == 0 else b"") + buf[a:b].tobytes()
            if text.count(self.delimiter) + 1 > self.columns:
                return True
        return False

    def _keep_tail(self, piece: bytes, fresh: bool) -> None:
        """Keep the bytes since the last record's end (``fresh``: one ended in this block)."""
        if fresh:
            self.tail, self.long = b"", False
        if self.long:
            return
        self.tail += piece
        if len(self.tail) > WIDE_TAIL:
            self.tail, self.long = b"", True

    def finish(self, last_record: bool) -> None:
        """Check the file's last record where no line break ends it (``last_record``)."""
        if self.over or not last_record or self.skip:
            return
        ext = self.before
        at = np.array([len(ext) - (1 if len(ext) and ext[-1] == 13 else 0)])
        if not self._ending(ext, at).any():
            return
        if self.wide:
            self.over = self.quoted or self.long or self.tail.count(self.delimiter) + 1 > self.columns
        else:
            self.over = self.carry + 1 > self.columns

    def _ending(self, ext: np.ndarray, last: np.ndarray) -> np.ndarray:
        """Which texts ending at ``last`` in ``ext`` end with the delimiter and a null token."""
        hit = np.zeros(len(last), bool)
        for end in self.ends:
            ok = last >= len(end)
            for k in range(len(end)):
                at = np.where(ok, last - len(end) + k, 0)
                ok &= ext[at] == end[k]
            hit |= ok
        return hit

    def _fields(
        self, buf: np.ndarray, isq: np.ndarray, parity: int, lo: np.ndarray, hi: np.ndarray
    ) -> np.ndarray:
        """The number of fields of the records of ``buf`` from ``lo`` to ``hi`` (sorted, apart) as
        far as the block holds them: the delimiters outside quotes among theirs, plus one
        (``parity``: of the quotes before the block)."""
        at = np.flatnonzero(buf == self.delimiter[0])
        first, last = np.searchsorted(at, lo), np.searchsorted(at, hi)
        counts = last - first
        total = int(counts.sum())
        if not total:
            return counts + 1
        which = np.repeat(np.arange(len(lo)), counts)  # each of their delimiters' record
        offsets = np.cumsum(counts) - counts
        mine = at[np.arange(total) - np.repeat(offsets - first, counts)]
        quotes = np.flatnonzero(isq.view(bool))
        inside = (np.searchsorted(quotes, mine) + parity) & 1
        outside = np.bincount(which, weights=1 - inside, minlength=len(lo)).astype(np.int64)
        return outside + 1

    def _outside(self, buf: np.ndarray, isq: np.ndarray, parity: int) -> np.ndarray:
        """Where the delimiters outside quotes are in ``buf`` (``parity``: of the quotes before it)."""
        at = np.flatnonzero(buf == self.delimiter[0])
        quotes = np.flatnonzero(isq.view(bool))
        if not len(quotes):
            return at if parity == 0 else at[:0]
        outside: np.ndarray = at[(np.searchsorted(quotes, at) + parity) & 1 == 0]
        return outside


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
    # COPY's text format: a backslash escapes the delimiter too, where the engine's reader would
    # split (the careful path reads such a record as COPY FROM does)
    split = how.delimiter[0] if breaks and len(how.delimiter) == 1 else -1
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
    nulls = _TrailingNulls(how, header) if how.null_tokens and how.columns else None
    spaced = _SpacedQuotes() if q >= 0 else None
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
            escaped = bool(np.any(odd & ((nxt == 10) | (nxt == 13) | (nxt == split)))) or (
                not final and len(ends) > 0 and ends[-1] + 2 >= len(buf)
            )
        parity_in = parity
        if len(nl):
            starts = np.concatenate(([0], nl + 1))
            if starts[-1] == len(buf):
                starts = starts[:-1]
            acc = np.bitwise_xor.accumulate(np.bitwise_xor.reduceat(isq, starts)) ^ parity
            cuts = nl[acc[: len(nl)] == 0]  # the line breaks outside quotes
            parity = int(acc[-1])
        else:
            cuts = nl
            parity ^= int(np.count_nonzero(isq) & 1)
        ends = cuts + pos
        empty = np.zeros(0, bool)
        if len(ends):
            prev = np.empty_like(ends)
            prev[0] = last_end
            prev[1:] = ends[:-1]
            gap = ends - prev
            at = cuts - 1
            before = np.where(at >= 0, buf[np.maximum(at, 0)], last_byte)
            empty = (gap == 1) | ((gap == 2) & (before == 13))
            blanks = int(np.count_nonzero(empty))
            blank += blanks
            count += len(ends) - blanks
            last_end = int(ends[-1])
        if nulls is not None:
            nulls.block(buf, isq, parity_in, cuts, empty)
        if spaced is not None:
            spaced.block(buf, isq, parity_in, parity)
        pos += len(buf)
        if len(buf):
            last_byte = int(buf[-1])
    rest = pos - 1 - last_end  # bytes after the last record's line break
    unended = rest > 1 or (rest == 1 and last_byte != 13)
    if unended:
        count += 1
    plain = check is None or check.plain
    if nulls is not None:
        nulls.finish(unended)
    fits = nulls is None or not nulls.over
    padded = spaced is not None and spaced.found
    readable = parity == 0 and not escaped and plain and not cr_data and fits and not padded
    return Counted(count - (1 if header and count else 0), readable, blank)
