"""The DuckDB adapter: everything that is specific to running plans on DuckDB.

Plans are sqlglot expressions; this adapter renders them in DuckDB's dialect,
registers Arrow tables as relations, materialises steps and writes files.
"""

from __future__ import annotations

import contextlib
import copy as copy_mod
import errno
import json
import os
import re
import secrets
import struct
import threading
from collections.abc import Callable, Collection, Iterator, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor, wait
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING, Any, TypeVar

import duckdb
import pyarrow as pa

from cdcnorm.errors import CdcnormError, DiskSpaceError, EngineMemoryError, InputError
from cdcnorm.positions import HEX_DIGITS, HEX_KEY
from cdcnorm.sql import ident, lit

if TYPE_CHECKING:
    from sqlglot import exp

T = TypeVar("T")

#: Share of the machine's physical memory the engine may use when no limit is given; beyond its
#: limit the engine spills to the run's temporary folder.
DEFAULT_MEMORY_SHARE = 0.5


#: Of a run's memory limit, the share kept back from the engine (at most RESERVE_CAP): what the
#: engine's buffer manager does not count (the readers' blocks, Arrow batches on their way to a
#: file, allocator slack) lives there, so the whole process stays near the limit.
RESERVE_SHARE = 0.25
RESERVE_CAP = 256 << 20
#: What the buffer manager does not count also grows with what the engine spills: above a 1GB
#: limit the peak grew by 35 MiB per GiB of CSV from 20M to 50M rows (170 -> 364 MiB), and polling the
#: engine's own accounting showed about 9 MiB per spilled GB. Keeping that much more of the limit
#: back starved the engine instead: at 50M rows, 389 MiB of engine memory ran out in a window step
#: that 715 MiB (the fixed reserve) converts. So the growth is predicted, not reserved: a run whose
#: input may take the process more than MEMORY_OVERHEAD above its limit is told so.
UNCOUNTED_PER_SPILLED = 36 / 1024  # per byte of input beyond the engine's memory
UNCOUNTED_BASE = 50 << 20
#: How far above --memory-limit the process is meant to stay (the peak resident memory's target).
MEMORY_OVERHEAD = 400 * 10**6
#: Below this the engine keeps the whole limit: it needs some working memory for any step.
ENGINE_FLOOR = 64 << 20
#: The oldest DuckDB cdcnorm runs on. 2.0 is the first to read a hex text of more than 64 bits
#: into a 128-bit integer (the hex positions' and sequences' keys: 1.x gives NULL, so every such
#: position would be refused); 2.0.0 still ignored a small spill limit, needed pytz to return
#: timestamps with a zone, and named a view's column after its expression where a quoted alias
#: gave it another case (each found by the test suite, which passes on 2.0.1).
OLDEST_DUCKDB = (2, 0, 1)


#: The oldest sqlglot whose DuckDB SQL DuckDB 2 takes: before 30.25 it writes lambdas with the
#: arrow DuckDB 2 refuses (``x -> ...``), and every plan step with one failed.
OLDEST_SQLGLOT = (30, 25, 0)


def _numbers(version: str) -> tuple[int, ...]:
    return tuple(int(x) for x in version.split(".")[:3] if x.isdigit())


def check_version(version: str = duckdb.__version__, sqlglot_version: str | None = None) -> None:
    """Refuse a DuckDB older than OLDEST_DUCKDB (or a sqlglot older than OLDEST_SQLGLOT), by
    name, before any plan runs on it."""
    if sqlglot_version is None:
        sqlglot_version = metadata.version("sqlglot")
    for package, found, oldest in (
        ("DuckDB", version, OLDEST_DUCKDB),
        ("sqlglot", sqlglot_version, OLDEST_SQLGLOT),
    ):
        if _numbers(found) < oldest:
            needed = ".".join(map(str, oldest))
            raise CdcnormError(
                f"cdcnorm needs {package} {needed} or later; this Python has {package} {found}",
                expected=f"{package.lower()} {needed} or later",
                found=found,
                hint=f"pip install '{package.lower()}>={needed}'",
            )


#: The engine memory each thread needs when --threads is not given: fewer threads are used under
#: a smaller limit. Measured on the benchmark dump (10 fields): the events' sort failed with two
#: threads at 107 and 143 MiB of engine memory each, and ran at 179 MiB each (5M rows).
THREAD_MEMORY = 160 << 20
#: the alias of a row made one line of text (``DuckDBEngine._write_lines``)
_ROW = "__cdcnorm_row"
#: rows per batch of a write of lines (``DuckDBEngine._write_lines``): the engine's vector
LINE_BATCH = 2048
#: The smallest read buffer of the engine's CSV reader (its longest line, too: see scan_csv).
CSV_MIN_BUFFER = 4 << 20


def _text_block(column: pa.Array) -> memoryview | bytes:
    """The texts of a column without NULLs, one after the other: the slice of its data buffer that
    its first and last offsets span (Arrow's layout of a string array)."""
    if column.null_count:
        raise ValueError("a line of text is NULL")
    if column.type not in (pa.string(), pa.large_string()):
        column = column.cast(pa.large_string())
    if not len(column):
        return b""
    form = "<q" if column.type == pa.large_string() else "<i"
    size = struct.calcsize(form)
    offsets = column.buffers()[1]
    (first,) = struct.unpack_from(form, offsets, column.offset * size)
    (last,) = struct.unpack_from(form, offsets, (column.offset + len(column)) * size)
    return memoryview(column.buffers()[2])[first:last]


@dataclass(frozen=True)
class CsvSyntax:
    """How the CSV files of one read are written, as the engine's reader is told."""

    header: bool
    delimiter: str
    quote: str
    escape: str  # what escapes a quote inside quotes: the quote itself (RFC 4180), a backslash, or ""
    nulls: tuple[str, ...]  # texts read as NULL, unquoted (never empty: the reader needs one)
    encoding: str  # the engine's name of the encoding
    max_line: int  # the longest record, in bytes


#: COPY's text format: the letters that stand for control characters after a backslash (PostgreSQL's
#: documentation, COPY, "Text Format"); a cell COPY writes (any character but a backslash, or a
#: backslash and a character that is no octal digit and no x); a cell's pieces, each an escape or a
#: run of other characters.
TEXT_ESCAPES = {"b": "\b", "f": "\f", "n": "\n", "r": "\r", "t": "\t", "v": "\v"}
_TEXT_CELL = "^(?s:[^\\\\]|\\\\[^0-7x])*$"
_TEXT_TOKEN = "(?s)\\\\.|[^\\\\]+"

_UNITS = {"bytes": 1, "KiB": 1 << 10, "MiB": 1 << 20, "GiB": 1 << 30, "TiB": 1 << 40}


#: The plan's own functions (see positions.py), as DuckDB macros: the engine inlines them.
PLAN_FUNCTIONS: dict[str, tuple[tuple[str, ...], str]] = {
    # at most 32 hex digits -> UHUGEINT, whose order is the number's and whose hex() gives them back
    HEX_KEY: (("digits",), "TRY_CAST('0x' || digits AS UHUGEINT)"),
    # below 32 digits, a one bit just above them makes hex() write every leading zero: a third of
    # the time of padding the text (lpad and right count characters, 0.27 s per 1M keys against
    # 0.08 s); the width is a constant, so the engine keeps one branch
    HEX_DIGITS: (
        ("k", "width"),
        "CASE WHEN width < 32 THEN right(hex(k | (CAST(1 AS UHUGEINT) << CAST(4 * least(width, 31) AS UHUGEINT))), width) "
        "ELSE right(lpad(hex(k), 32, '0'), width) END",
    ),
}


def _setting_bytes(con: duckdb.DuckDBPyConnection) -> int:
    """The engine's memory limit in bytes, read back as DuckDB shows it (``953.6 MiB``)."""
    (text,) = con.execute("SELECT current_setting('memory_limit')").fetchone() or ("0 bytes",)
    number, _, unit = str(text).partition(" ")
    return int(float(number) * _UNITS.get(unit, 1))


def out_of_memory(
    e: duckdb.OutOfMemoryException, where: str = "", temp: str | None = None
) -> EngineMemoryError | DiskSpaceError:
    """The engine's out-of-memory error in our words: a step that cannot spill below a minimum, or
    spill files that reached the temporary-space limit (which is a full disk, not a small memory)."""
    first = str(e).splitlines()[0].removeprefix("Out of Memory Error: ").rstrip(".")
    step = f" in {where}" if where else ""
    if "max_temp_directory_size" in str(e):
        return DiskSpaceError(
            f"the engine's spill files reached the temporary-space limit{step} ({first}); nothing was committed",
            file=temp,
            expected="room for the spill files (about five times the input's size on large inputs)",
            hint="free disk space there, give --scratch a folder on a larger disk, or raise --spill-limit "
            "(default: 90% of the space free when the run starts)",
        )
    return EngineMemoryError(
        f"the engine ran out of memory within the limit{step} ({first}); nothing was committed",
        hint="raise --memory-limit, or lower --threads (each thread needs its own working memory)",
    )


def disk_full(e: BaseException, where: str | None = None) -> DiskSpaceError | None:
    """A full disk in our words (the engine's I/O error or the system's), or None for another error."""
    text = str(e)
    if not (
        getattr(e, "errno", None) == errno.ENOSPC
        or os.strerror(errno.ENOSPC) in text
        or f'"errno":"{errno.ENOSPC}"' in text
    ):
        return None
    return DiskSpaceError(
        "the disk is full" + (f" while writing {where}" if where else "") + "; nothing was committed",
        file=getattr(e, "filename", None) or where,
        hint="free disk space (the landing area and the scratch folder), or give --scratch a folder on another disk",
    )


#: how the engine names the file it could not read: ``in file "x.jsonl"``, ``end of file 'x.parquet'``
_FILE_NAMED = re.compile(r"""file ['"]([^'"]+)['"]""")
_LINE_NAMED = re.compile(r"\bin line (\d+)")


def damaged_file(e: BaseException) -> InputError | None:
    """The engine's refusal of a file's bytes (malformed JSON, a Parquet file without its footer,
    a page that does not decode) in our words, naming the file; None for another error."""
    if not isinstance(e, duckdb.InvalidInputException | duckdb.IOException):
        return None
    first = str(e).splitlines()[0]
    named = _FILE_NAMED.search(first)
    if named is None or not Path(named.group(1)).is_file():
        return None
    line = _LINE_NAMED.search(first)
    return InputError(
        f"the file cannot be read: {first}",
        file=named.group(1),
        line=int(line.group(1)) if line else None,
        expected="a file whole and as it was written",
        found="bytes the engine cannot read (the file is damaged or cut short, or not what its name says)",
        hint="restore the file from a copy (a landing area's files can be written again by converting "
        "its dumps into a new landing area)",
    )


#: how an error a statement raises on purpose begins (``refusal``): the statement found a defect
#: of its input, which is reported as such (exit 4), not as a bug of the plan
REFUSED = "cdcnorm refuses the input: "


def refusal(message_sql: str) -> str:
    """SQL: stop the statement with the message (SQL text) as an input error (``refused_input``)."""
    return f"error({lit(REFUSED)} || {message_sql})"


def refused_input(e: BaseException) -> InputError | None:
    """An error a statement raised on purpose (``refusal``) in our words; None for another."""
    if not isinstance(e, duckdb.InvalidInputException):
        return None
    first = str(e).splitlines()[0]
    at = first.find(REFUSED)
    return None if at < 0 else InputError(first[at + len(REFUSED) :])


#: the engine's errors by the words their messages begin with (``engine_error``)
_ENGINE_ERRORS: dict[str, type[duckdb.Error]] = {
    "Out of Memory Error": duckdb.OutOfMemoryException,
    "Invalid Input Error": duckdb.InvalidInputException,
    "IO Error": duckdb.IOException,
    "INTERRUPT Error": duckdb.InterruptException,
    "Conversion Error": duckdb.ConversionException,
}


def engine_error(e: OSError) -> duckdb.Error:
    """The engine's error that a stream of Arrow batches passed on as an ``OSError`` with the
    engine's message, as the engine's own exception again (so ``engine_errors`` and
    ``interrupted`` tell it as they tell the engine's errors)."""
    text = str(e)
    kind = _ENGINE_ERRORS.get(text.partition(":")[0], duckdb.Error)
    return kind(text)


@contextlib.contextmanager
def engine_errors(temp: Path | str | None, where: str = "", writing: str | None = None) -> Iterator[None]:
    """Out of memory, out of spill space or a full disk, in our words: ``temp`` is where the spill
    files are, ``where`` the step that ran out of memory, ``writing`` what was being written."""
    try:
        yield
    except duckdb.OutOfMemoryException as e:
        raise out_of_memory(e, where, None if temp is None else str(temp)) from None
    except (duckdb.Error, OSError) as e:
        known = disk_full(e, writing) or damaged_file(e) or refused_input(e)
        if known is not None:
            raise known from None
        raise


def interrupted(e: BaseException) -> bool:
    """Whether ``e`` is Ctrl-C. DuckDB's Python client raises a query interrupted on the main thread
    as a plain ``RuntimeError`` ("Query interrupted"), not as ``InterruptException``, whenever
    another thread is running too (a reader's thread, a second connection; measured with DuckDB
    2.0.1)."""
    return isinstance(e, KeyboardInterrupt | duckdb.InterruptException) or (
        type(e) is RuntimeError and str(e) == "Query interrupted"
    )


def _in_utc(con: duckdb.DuckDBPyConnection) -> None:
    """The session's time zone (per connection) as UTC. Without the ICU extension DuckDB already
    treats TIMESTAMPTZ as UTC."""
    with contextlib.suppress(duckdb.Error):
        con.execute("SET TimeZone = 'UTC'")


def engine_share(budget: int) -> int:
    """Of a run's memory limit (``budget`` bytes), what the engine's buffers get."""
    return max(budget - min(int(budget * RESERVE_SHARE), RESERVE_CAP), min(budget, ENGINE_FLOOR))


def predicted_overhead(budget: int, input_bytes: int) -> int:
    """Bytes the process is predicted to hold above a limit of ``budget`` for ``input_bytes`` of
    input: what the engine does not count, growing with what it spills."""
    return UNCOUNTED_BASE + int(UNCOUNTED_PER_SPILLED * max(0, input_bytes - engine_share(budget)))


def default_memory_limit() -> str:
    try:
        total = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        return "4GB"
    return f"{int(total * DEFAULT_MEMORY_SHARE) >> 20}MB"


def parquet_member(keys: tuple[str, ...]) -> str:
    """SQL of a Parquet column (one key) or of a member of its structs (more keys)."""
    out = ident(keys[0])
    for k in keys[1:]:
        out = f"struct_extract({out}, {lit(k)})"
    return out


class DuckDBEngine:
    name = "duckdb"
    dialect = "duckdb"
    #: plan steps are tables and views of the run's own in-memory database (which every connection
    #: of the run sees: ``spread``), replaced when they exist; not a session's temporary relations
    TEMPORARY = False

    def __init__(
        self,
        *,
        memory_limit: str | None = None,
        threads: int | None = None,
        temp_directory: str | None = None,
        spill_limit: str | None = None,
        input_bytes: int = 0,
    ) -> None:
        """``input_bytes``: the run's input as text (estimated), for ``memory_note``."""
        check_version()
        #: the run's memory limit as given (or the default's), for messages
        self.memory_limit = memory_limit or default_memory_limit()
        config: dict[str, Any] = {"preserve_insertion_order": True, "memory_limit": self.memory_limit}
        if threads:
            config["threads"] = threads
        if temp_directory:
            config["temp_directory"] = temp_directory
        if spill_limit:
            config["max_temp_directory_size"] = spill_limit
        self.temp_directory = temp_directory
        self.con = duckdb.connect(":memory:", config=config)
        # the limit is the run's: the engine gets it less a reserve for what it does not count
        budget = _setting_bytes(self.con)
        engine = engine_share(budget)
        #: the limit the run was given and the input it was planned for, in bytes
        self.memory_budget = budget
        self.input_bytes = input_bytes
        #: what the engine's own buffers may hold (the readers and threads are sized from it)
        self.engine_memory = max(engine, 1 << 20)
        self.con.execute(f"SET memory_limit = '{self.engine_memory >> 10}KiB'")
        if not threads:  # as many threads as the engine's memory feeds (each sort needs its own)
            cores = self.threads()
            fed = max(1, self.engine_memory // THREAD_MEMORY)
            if fed < cores:
                self.con.execute(f"SET threads = {fed}")
        for name, (params, body) in PLAN_FUNCTIONS.items():
            self.con.execute(f"CREATE OR REPLACE MACRO {name}({', '.join(params)}) AS {body}")
        _in_utc(self.con)
        # keep Arrow tables alive while DuckDB scans them
        self._registered: dict[str, pa.Table] = {}
        #: every numbered view (``number_rows``, ``number_joined_rows``): the scanned table under
        #: it, its columns, and each of its files' (id, first rowid, rows), for ``lookup``; one
        #: dict that sibling connections share
        self._numbered_views: dict[str, tuple[str, tuple[str, ...], tuple[tuple[int, int, int], ...]]] = {}
        # a view of decoded cells -> the relation under it, and the view's SQL over a relation ({})
        self._decoding_views: dict[str, tuple[str, Callable[[str], str]]] = {}
        # marks JSON Lines numbers read as written (types/json.py: tag_numbers_of_valid); random, so that
        # no text of a dump can look like it
        self.number_tag = f"~n{secrets.token_hex(8)}~"

    def memory_note(self) -> str | None:
        """When the input is so large that the process may go more than MEMORY_OVERHEAD above the
        limit: by how much, and the limit that would keep it within (None when it is not)."""
        over = predicted_overhead(self.memory_budget, self.input_bytes)
        if over <= MEMORY_OVERHEAD:
            return None
        # the smallest limit whose engine spills little enough (its share: the limit less 256 MiB)
        room = int((MEMORY_OVERHEAD - UNCOUNTED_BASE) / UNCOUNTED_PER_SPILLED)
        needed = max(self.input_bytes - room + RESERVE_CAP, self.memory_budget)
        return (
            f"about {self.input_bytes / (1 << 30):,.1f} GiB of input is large for a memory limit of "
            f"{self.memory_limit}: what the engine spills takes memory it does not count (about "
            f"{UNCOUNTED_PER_SPILLED * 1024:.0f} MiB per GiB of input beyond the engine's memory, as measured), so the process may peak about {over >> 20:,} MiB above the limit, "
            f"more than the {MEMORY_OVERHEAD // 10**6} MB it is meant to; --memory-limit "
            f"{-(-needed // 10**9)}GB or more keeps it within"
        )

    @staticmethod
    def pretty(expression: exp.Expr) -> str:
        """A plan step as DuckDB SQL for people (``--show-plan``)."""
        return expression.sql(dialect="duckdb", pretty=True)

    def render(self, expression: exp.Expr | str) -> str:
        """A plan step as this engine's SQL. The plan is written in this engine's dialect: its
        text (``Step.sql``) runs as written, and the generator changes nothing in an expression,
        so it writes one without copying it first (the copy took 37% of a 300-column table's
        run). ``tests/test_plan_engines.py`` checks that every step of the example plans is left
        as it was, written as a copy would be, and gives the rows its text gives."""
        if isinstance(expression, str):
            return expression
        return expression.sql(dialect=self.dialect, copy=False)

    def threads(self) -> int:
        return int(self.rows("SELECT current_setting('threads')")[0][0])

    def spread(self, items: Sequence[T], work: Callable[[DuckDBEngine, T], None], width: int = 2) -> None:
        """``work(engine, item)`` for every item, on up to ``width`` connections to this engine's
        database at once (this engine and siblings), each taking the next item when it is done.

        For work whose time is the engine's fixed cost per statement (binding and planning a
        step of a small table), which runs on one thread: two connections keep two cores busy.
        The plan's relations and functions are in the database's catalog, which every connection
        sees; items must not share relation names. The first error stops the others from taking
        new items and is raised once they are done. One connection when the engine has one
        thread.

        The connections work on threads of their own while the main thread only waits: Python
        sees Ctrl-C on the main thread, and a query the main thread ran itself would notice it
        only between the engine's tasks, which can be a long wait. Ctrl-C interrupts every
        connection at once and is raised as ``KeyboardInterrupt``.
        """
        width = min(width, self.threads(), len(items))
        if width < 2:
            for item in items:
                work(self, item)
            return
        pending = iter(items)
        lock = threading.Lock()
        failed: list[BaseException] = []
        done = object()

        def take() -> Any:
            with lock:
                return done if failed else next(pending, done)

        def drain(engine: DuckDBEngine) -> None:
            try:
                while (item := take()) is not done:
                    work(engine, item)
            except BaseException as e:
                with lock:
                    failed.append(e)

        engines = [self, *(self.sibling() for _ in range(width - 1))]
        try:
            with ThreadPoolExecutor(max_workers=width) as pool:
                running = [pool.submit(drain, engine) for engine in engines]
                try:
                    wait(running)
                except BaseException:
                    with lock:  # Ctrl-C: no new item, and every connection stops now
                        failed.append(KeyboardInterrupt())
                    for engine in engines:
                        engine.con.interrupt()
                    raise KeyboardInterrupt from None
        finally:
            for engine in engines[1:]:
                engine.con.close()
        if failed:
            if interrupted(failed[0]):
                raise KeyboardInterrupt from None
            raise failed[0]

    def sibling(self) -> DuckDBEngine:
        """This engine on another connection to the same database: the same catalog and settings;
        the registered Arrow tables and the session's time zone, which are per connection, are
        given again."""
        other = copy_mod.copy(self)
        other.con = self.con.cursor()
        _in_utc(other.con)
        other._registered = dict(self._registered)
        for name, table in other._registered.items():
            other.con.register(name, table)
        return other

    def register(self, name: str, table: pa.Table) -> None:
        self._registered[name] = table
        self.con.register(name, table)

    def unregister(self, name: str) -> None:
        self.con.unregister(name)
        self._registered.pop(name, None)

    def drop(self, name: str) -> None:
        self.con.execute(f"DROP TABLE IF EXISTS {ident(name)}")

    def execute(self, expression: exp.Expr | str) -> None:
        self.con.execute(self.render(expression))

    def materialize(self, name: str, expression: exp.Expr | str) -> None:
        self._run(name, f"CREATE OR REPLACE TABLE {ident(name)} AS {self.render(expression)}")

    def view(self, name: str, expression: exp.Expr | str) -> None:
        self._run(name, f"CREATE OR REPLACE VIEW {ident(name)} AS {self.render(expression)}")

    def _run(self, name: str, sql: str) -> None:
        step = f"plan step {name}"
        try:
            with engine_errors(self.temp_directory, step, f"{step} (spill files in {self.temp_directory})"):
                self.con.execute(sql)
        except duckdb.Error as e:
            first = str(e).splitlines()[0]
            raise CdcnormError(
                f"the engine could not run plan step {name}: {first}",
                hint="this is a bug in cdcnorm; `cdcnorm convert --show-plan` prints the SQL for a report",
            ) from None

    def arrow(self, expression: exp.Expr | str) -> pa.Table:
        return self.con.sql(self.render(expression)).to_arrow_table()

    def rows(self, expression: exp.Expr | str) -> list[tuple[Any, ...]]:
        return self.con.execute(self.render(expression)).fetchall()

    def copy(self, expression: exp.Expr | str, path: Path, fmt: str) -> int:
        """Write a query's rows to ``path`` atomically (temporary name, then rename); rows written."""
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_name(f"{path.name}.tmp-{os.getpid()}")
        query = self.render(expression)
        try:
            with engine_errors(self.temp_directory, f"writing {path.name}", str(path)):
                if fmt in ("json", "lines"):
                    written = self._write_lines(query, tmp, fmt)
                else:
                    written = self._copy(query, tmp, fmt)
                os.replace(tmp, path)
            return written
        finally:
            if tmp.exists():
                tmp.unlink()

    def _copy(self, query: str, tmp: Path, fmt: str) -> int:
        """The engine's own writer: Parquet (every column optional) or CSV (RFC 4180 with a header;
        NULL is an empty field, an empty text is quoted)."""
        if fmt == "parquet":
            query, options = self._optional_columns(query), "FORMAT PARQUET"
        elif fmt == "csv":
            options = "FORMAT CSV, HEADER true"
        else:
            raise ValueError(f"no writer for {fmt!r}")
        written = self.con.execute(f"COPY ({query}) TO {lit(str(tmp))} ({options})").fetchone()
        return int(written[0]) if written else 0

    def _write_lines(self, query: str, tmp: Path, fmt: str) -> int:
        """Write one text per line: "json" one JSON object per row (RFC 8259), the columns as its
        members in order (``to_json``: the engine's JSON writer's text); "lines" the first column's
        text as is, NULL as an empty line (the texts are JSON texts, whose control characters are
        escaped, so none holds a line break). The lines are made on every thread and streamed
        from the engine a batch at a time, each batch's text written as one block: no row is
        handled in Python, and no batch but the current one is held.

        The engine's own writers of text (JSON and CSV alike) spent most of a large write spinning
        on two threads (sched_yield, in kernel time: the 1M-row benchmark's events took 5.4-7.2 s
        in most runs). Written on one thread instead, from the rows made on two, the 1M-row run
        took the time this takes, and 3-4% more at 5M rows, with a larger peak (the rows held in a
        table); from the lines made on two, 7% less at 1M rows but 13% more at 5M (the 1.9 GB
        write took 10 s). Batches of 2,048 rows (the engine's vector) keep each block in the
        processor's cache while the kernel copies it: with 65,536 rows the copy into the page
        cache took twice the kernel time (DuckDB 2.0.1, 2 cores)."""
        text = f"to_json({_ROW})" if fmt == "json" else "coalesce(CAST(#1 AS VARCHAR), '')"
        reader = self.con.sql(f"SELECT {text} || chr(10) AS line FROM ({query}) AS {_ROW}").to_arrow_reader(
            LINE_BATCH
        )
        rows = 0
        batches = iter(reader)
        with open(tmp, "wb") as out:
            while True:
                try:
                    batch = next(batches)
                except StopIteration:
                    return rows
                except OSError as e:  # the engine's error, as Arrow's stream passes it on
                    raise engine_error(e) from None
                out.write(_text_block(batch.column(0)))
                rows += batch.num_rows

    def _optional_columns(self, query: str) -> str:
        """The query with every column optional (nullable) in the Parquet schema. The engine's
        Parquet writer marks a column required when it can tell it holds no NULL (a column of this
        run's data that happens to have none, a constant): the schema then changed from run to run
        with the data (``committed_at`` required in one run's events, optional in the next), and
        files of two runs could not be read as one table (pyarrow's concat_tables refuses them). A
        CASE with a NULL branch is optional to the writer; the values and their order are the
        query's (a projection keeps its input's order)."""
        names = [r[0] for r in self.con.execute(f"DESCRIBE {query}").fetchall()]
        cols = ", ".join(
            f"CASE WHEN q.{ident(n)} IS NOT NULL THEN q.{ident(n)} END AS {ident(n)}" for n in names
        )
        return f"SELECT {cols} FROM ({query}) AS q"

    # --- loading dumps: what the readers ask of the engine ---------------------------------
    #
    # Readers decide what to read (files, columns, options, which records are malformed); these
    # methods are how DuckDB reads it. Every loaded relation has __file, __row, __enc and the
    # reader's internal column names, all text.

    def count(self, relation: str, where: str = "TRUE") -> int:
        return int(self.rows(f"SELECT count(*) FROM {ident(relation)} WHERE {where}")[0][0])

    def csv_scan(self, paths: list[str], columns: list[str], syntax: CsvSyntax, rejects: str | None) -> str:
        """SQL: the engine's strict parallel reader over ``paths``, every column as text (with
        ``__fname``); a record it cannot split goes to the tables ``rejects`` and ``rejects_scan``,
        or, with ``rejects`` None, fails the statement."""
        cols = "{" + ", ".join(f"{lit(c)}: 'VARCHAR'" for c in columns) + "}"
        # The reader's buffers come out of the engine's memory (its own default is 16 longest
        # lines, 512 MiB here, more than a whole limit): one buffer of the longest line, and at
        # most an eighth of the engine's memory. A longer record is a reject, which the careful
        # path reads with the full limit (``max_line``).
        line = min(syntax.max_line, max(CSV_MIN_BUFFER, self.engine_memory // 8))
        kept = (
            f"ignore_errors = true, store_rejects = true, rejects_table = {lit(rejects)}, "
            f"rejects_scan = {lit(rejects + '_scan')}, "
            if rejects
            else ""
        )
        return (
            f"read_csv([{', '.join(lit(p) for p in paths)}], columns = {cols}, "
            f"header = {str(syntax.header).lower()}, delim = {lit(syntax.delimiter)}, "
            f"quote = {lit(syntax.quote)}, escape = {lit(syntax.escape)}, auto_detect = false, "
            f"allow_quoted_nulls = false, nullstr = [{', '.join(lit(t) for t in syntax.nulls)}], "
            f"encoding = {lit(syntax.encoding)}, strict_mode = true, {kept}"
            f"max_line_size = {line}, buffer_size = {line}, filename = '__fname', parallel = true)"
        )

    def scan_csv(
        self, table: str, paths: list[str], columns: list[str], syntax: CsvSyntax
    ) -> tuple[set[str], dict[str, tuple[int, int, int]]] | None:
        """Load CSV files with the engine's strict parallel reader into ``table`` (rows in file
        order, with ``__fname``). Returns the paths with any reject and, per path, (rows, first
        rowid, last rowid); None when the reader cannot read the files at all."""
        rejects = f"{table}_rejects"
        scan = self.csv_scan(paths, columns, syntax, rejects)
        try:
            self.con.execute(f"CREATE TABLE {ident(table)} AS SELECT * FROM {scan}")
            rejected = {
                str(p)
                for (p,) in self.rows(
                    f"SELECT DISTINCT s.file_path FROM {ident(rejects)} e JOIN {ident(rejects + '_scan')} s "
                    "ON e.scan_id = s.scan_id AND e.file_id = s.file_id"
                )
            }
        except duckdb.OutOfMemoryException as e:
            self.drop(table)
            # not a defect of the files: the careful path would only take longer
            raise out_of_memory(e, f"reading {len(paths)} CSV files", self.temp_directory) from None
        except duckdb.Error:
            self.drop(table)
            return None
        finally:
            self.con.execute(
                f"DROP TABLE IF EXISTS {ident(rejects)}; DROP TABLE IF EXISTS {ident(rejects + '_scan')}"
            )
        spans = {
            str(p): (int(n), int(lo), int(hi))
            for p, n, lo, hi in self.rows(
                f"SELECT __fname, count(*), min(rowid), max(rowid) FROM {ident(table)} GROUP BY __fname"
            )
        }
        return rejected, spans

    def number_rows(
        self, view: str, table: str, files: list[tuple[str, int, int, int]], columns: list[str]
    ) -> None:
        """A view of a scanned table's rows with file ids and record numbers (rowid - first + 1)
        for the files given as (path, id, first rowid, rows); other files' rows are left out."""
        values = (
            "(VALUES " + ", ".join(f"({lit(p)}, {i}, {lo})" for p, i, lo, _ in files) + ") f(path, id, base)"
        )
        spans = tuple((i, lo, n) for _, i, lo, n in files)
        self._numbered(view, table, columns, f"JOIN {values} ON r.__fname = f.path", spans)

    def number_joined_rows(
        self, view: str, table: str, firsts: list[tuple[int, int, int]], columns: list[str]
    ) -> None:
        """A view of a table scanned from several files joined into one, with file ids and record
        numbers, given each file's (id, first rowid, rows), in rowid order: a row belongs to the
        file with the greatest first rowid at or below its own."""
        values = "(VALUES " + ", ".join(f"({i}, {lo})" for i, lo, _ in firsts) + ") f(id, base)"
        self._numbered(view, table, columns, f"ASOF JOIN {values} ON r.rowid >= f.base", tuple(firsts))

    def _numbered(
        self, view: str, table: str, columns: list[str], join: str, spans: tuple[tuple[int, int, int], ...]
    ) -> None:
        """The raw relation's view over a scanned table ``r``, whose ``join`` gives each row its
        file's ``f.id`` and first rowid ``f.base``."""
        self.con.execute(
            f"CREATE VIEW {ident(view)} AS SELECT CAST(f.id AS INTEGER) AS __file, "
            f"CAST(r.rowid - f.base + 1 AS BIGINT) AS __row, CAST(NULL AS VARCHAR) AS __enc, "
            f"{', '.join(f'r.{ident(c)}' for c in columns)} FROM {ident(table)} r {join}"
        )
        self._numbered_views[view] = (table, tuple(columns), spans)

    def drop_raw(self, relation: str) -> None:
        """Drop a raw relation: a numbered view with the scanned table under it, a view of decoded
        cells with the relation under it, or a table."""
        decoding = self._decoding_views.pop(relation, None)
        if decoding is not None:
            self.con.execute(f"DROP VIEW IF EXISTS {ident(relation)}")
            self.drop_raw(decoding[0])
            return
        numbered = self._numbered_views.pop(relation, None)
        if numbered is None:
            self.drop(relation)
            return
        self.con.execute(f"DROP VIEW IF EXISTS {ident(relation)}")
        self.drop(numbered[0])

    def lookup(self, view: str, wanted: str) -> str | None:
        """SQL of a relation of the rows of numbered view ``view`` (or of a view of decoded cells
        over one) that relation ``wanted`` names by ``__file`` and ``__row`` (each once), with the
        view's columns, fetched by rowid; None when ``view`` is not such a view, or when ``wanted`` names more than a quarter of its
        rows. A join on the view's ``__file`` and ``__row`` reads every column of every row first:
        for 16 rows of a 1M-row, 14-column dump it took 0.1 s against 0.005 s by rowid. For half
        the rows both took 0.3 s; for all of them the join took 0.52 s, the rowid fetch 0.66 s."""
        if view in self._decoding_views:
            under, decoded = self._decoding_views[view]
            found = self.lookup(under, wanted)
            return None if found is None else f"({decoded(found)})"
        if view not in self._numbered_views:
            return None
        table, columns, spans = self._numbered_views[view]
        if 4 * int(self.rows(f"SELECT count(*) FROM {wanted}")[0][0]) > sum(n for _, _, n in spans):
            return None
        values = "(VALUES " + ", ".join(f"({i}, {lo}, {n})" for i, lo, n in spans) + ") f(id, base, n)"
        keys = (
            f"SELECT DISTINCT q.__file, q.__row, f.base + q.__row - 1 AS __rid FROM {wanted} q "
            f"JOIN {values} ON f.id = q.__file AND q.__row BETWEEN 1 AND f.n"
        )
        picked = "".join(f", r.{ident(c)}" for c in columns)
        return (
            f"(SELECT CAST(k.__file AS INTEGER) AS __file, CAST(k.__row AS BIGINT) AS __row, "
            f"CAST(NULL AS VARCHAR) AS __enc{picked} FROM {ident(table)} r JOIN ({keys}) k ON r.rowid = k.__rid)"
        )

    def load_batches(self, table: str, batches: pa.RecordBatchReader, select: str = "*") -> None:
        """Stream record batches into a new table (the engine pulls them; nothing is held whole)."""
        self.con.register("__incoming_batches", batches)
        try:
            self.con.execute(f"CREATE TABLE {ident(table)} AS SELECT {select} FROM __incoming_batches")
        finally:
            self.con.unregister("__incoming_batches")

    def decode_text(self, table: str, source: str, columns: list[tuple[str, str]]) -> None:
        """``source`` (``__file``, ``__row`` and binary cells) -> ``table`` with text cells; a cell that is not
        UTF-8 becomes NULL and is listed in ``__enc`` as a JSON object {raw name: base64}.
        ``columns`` are (internal name, raw name)."""
        cells = []
        bad = []
        for c, raw_name in columns:
            col = ident(c)
            cells.append(f"try(decode({col})) AS {col}")
            key = lit(json.dumps(raw_name) + ":")
            bad.append(
                f"CASE WHEN {col} IS NOT NULL AND try(decode({col})) IS NULL THEN {key} || to_json(to_base64({col})) END"
            )
        listed = f"concat_ws(',', {', '.join(bad)})"
        enc = f"CASE WHEN {listed} <> '' THEN '{{' || {listed} || '}}' END"
        self.con.execute(
            f"CREATE TABLE {ident(table)} AS SELECT CAST(__file AS INTEGER) AS __file, __row, "
            f"{enc} AS __enc, {', '.join(cells)} FROM {ident(source)}"
        )

    def unescape_text(
        self,
        view: str,
        source: str,
        columns: list[tuple[str, str]],
        nulls: Sequence[str],
        delimiter: str,
        malformed: str,
        encoding: str = "utf-8",
    ) -> dict[int, int]:
        """COPY's text format (PostgreSQL's documentation, COPY, "Text Format"): a view ``view`` of
        ``source`` with its cells decoded: a cell equal to one of ``nulls`` is NULL; after a
        backslash, b f n r t v stand for their control characters and any other character for
        itself. A row with a cell COPY never writes (an octal ``\\101`` or hex ``\\x41`` sequence,
        which name bytes, or a lone backslash at its end) is left out of the view and appended to
        ``malformed`` with its record's text (the cells joined by ``delimiter``; the base64 of their
        bytes where a cell is not text in the dump's ``encoding``) and the reason.
        Returns how many rows each file id lost so. ``columns``: (internal name, raw name), in the
        file's order. A cell with no backslash is not looked at twice."""
        controls = " ".join(
            f"WHEN t = {lit(chr(92) + k)} THEN chr({ord(v)})" for k, v in TEXT_ESCAPES.items()
        )
        why = ": a backslash sequence that names a byte (an octal \\0 or \\101, a hex \\x41), or a lone backslash at its end: COPY writes neither"
        reason = " ".join(
            f"WHEN contains({ident(c)}, '\\') AND NOT regexp_full_match({ident(c)}, {lit(_TEXT_CELL)}) "
            f"THEN {lit('column ' + name + why)}"
            for c, name in columns
        )
        reason = f"CASE {reason} END" if columns else "NULL"
        tokens = ", ".join(lit(t) for t in nulls)
        cells = ", ".join(
            f"CASE WHEN {ident(c)} IN ({tokens}) THEN NULL WHEN NOT contains({ident(c)}, '\\') THEN {ident(c)} "
            f"ELSE array_to_string(list_transform(regexp_extract_all({ident(c)}, {lit(_TEXT_TOKEN)}), "
            f"lambda t: CASE WHEN t[1] <> '\\' THEN t {controls} ELSE t[2] END), '') END AS {ident(c)}"
            for c, _ in columns
        )

        # A cell the reader could not decode is NULL here, its bytes in __enc: the record is then
        # shown as the base64 of its bytes (as the careful path shows one), not with a character in
        # place of the cell. The member of a name in __enc, as a JSON pointer (RFC 6901, section 3).
        def pointer(name: str) -> str:
            return lit("/" + name.replace("~", "~0").replace("/", "~1"))

        text = f"concat_ws({lit(delimiter)}, {', '.join(ident(c) for c, _ in columns)})"
        cell_bytes = [
            f"coalesce(encode({ident(c)}), from_base64(json_extract_string(__enc, {pointer(name)})))"
            for c, name in columns
        ]
        as_bytes = f" || encode({lit(delimiter)}) || ".join(cell_bytes) if columns else "''::BLOB"
        shown = f"CASE WHEN __enc IS NULL THEN {text} ELSE to_base64({as_bytes}) END"
        # (in a dump not in UTF-8 the other cells' bytes are their text's in UTF-8)
        note = "; not UTF-8 text (text shown base64)"
        if encoding.lower().replace("_", "-") not in ("utf-8", "utf8"):
            note = f"; a cell is not {encoding} text (text shown base64, the other cells in UTF-8)"
        why = f"__bad || CASE WHEN __enc IS NULL THEN '' ELSE {lit(note)} END"
        counted = f"SELECT __file, count(*) FROM {ident(malformed)} GROUP BY __file"
        before = dict(self.rows(counted))
        self.con.execute(
            f"INSERT INTO {ident(malformed)} SELECT __file, __row, {shown}, {why} "
            f"FROM (SELECT *, {reason} AS __bad FROM {ident(source)}) WHERE __bad IS NOT NULL"
        )
        lost = {
            int(f): int(n) - int(before.get(f, 0)) for f, n in self.rows(counted) if n != before.get(f, 0)
        }
        # the decoded rows of a relation of ``source``'s rows: the view, or ``lookup``'s by rowid
        picked = f", {cells}" if columns else ""

        def decoded(relation: str) -> str:
            return f"SELECT __file, __row, __enc{picked} FROM (SELECT *, {reason} AS __bad FROM {relation}) WHERE __bad IS NULL"

        self.con.execute(f"CREATE VIEW {ident(view)} AS {decoded(ident(source))}")
        self._decoding_views[view] = (source, decoded)
        return lost

    def replace_cells(self, view: str, source: str, columns: list[str], token: str, to: str | None) -> None:
        """A view ``view`` of ``source`` in which a cell of ``columns`` equal to ``token`` is the
        text ``to``, or NULL for None (a null token the engine's reader cannot be told of, as it
        holds the reader's escape; an empty text a dump writes as a token, ``csv.empty``)."""
        value = "NULL" if to is None else lit(to)
        cells = "".join(
            f", CASE WHEN {ident(c)} = {lit(token)} THEN {value} ELSE {ident(c)} END AS {ident(c)}"
            for c in columns
        )

        def marked(relation: str) -> str:
            return f"SELECT __file, __row, __enc{cells} FROM {relation}"

        self.con.execute(f"CREATE VIEW {ident(view)} AS {marked(ident(source))}")
        self._decoding_views[view] = (source, marked)

    def set_column(self, table: str, column: str, values: pa.Table) -> None:
        """Set ``column`` of the rows of ``table`` that ``values`` (``__file``, ``__row``, ``column``)
        names to its values there."""
        self.con.register("__set_values", values)
        try:
            self.con.execute(
                f"UPDATE {ident(table)} t SET {ident(column)} = v.{ident(column)} FROM __set_values v "
                "WHERE t.__file = v.__file AND t.__row = v.__row"
            )
        finally:
            self.con.unregister("__set_values")

    def create_malformed(self, table: str) -> None:
        self.con.execute(
            f"CREATE TABLE IF NOT EXISTS {ident(table)} "
            "(__file INTEGER, __row BIGINT, text VARCHAR, reason VARCHAR)"
        )

    def append(self, table: str, rows: pa.Table) -> None:
        self.con.register("__appended_rows", rows)
        try:
            self.con.execute(f"INSERT INTO {ident(table)} SELECT * FROM __appended_rows")
        finally:
            self.con.unregister("__appended_rows")

    def scan_parquet(
        self, path: Path, nested: Sequence[tuple[str, ...]] = (), own: Sequence[str] | None = None
    ) -> list[tuple[tuple[str, ...], str, tuple[str, ...]]]:
        """The columns of a Parquet file and their engine types, as (keys, type, engine keys): a
        top-level column's keys are its name; then each ``nested`` key path that reaches a member
        of a struct column (``("after", "id")``), in order; a path that reaches none is left out.

        ``own`` are the file's own top-level names, read from its schema: the engine's names differ
        where two differ only in case (``name``, ``Name``), which it reads as ``name``, ``Name_1``
        and binds without regard to case. Keys are the file's names, engine keys address them."""
        src = f"read_parquet({lit(str(path))})"
        described = [(str(r[0]), str(r[1])) for r in self.rows(f"DESCRIBE SELECT * FROM {src}")]
        shown = list(own) if own is not None and len(own) == len(described) else [n for n, _ in described]
        engine_name = {s: e for s, (e, _) in zip(shown, described, strict=True)}
        found: list[tuple[tuple[str, ...], str, tuple[str, ...]]] = [
            ((s,), typ, (e,)) for s, (e, typ) in zip(shown, described, strict=True)
        ]
        structs = {s for s, (_, typ) in zip(shown, described, strict=True) if typ.startswith("STRUCT")}
        for keys in nested:
            # a top-level column named with the dots is that column
            if len(keys) < 2 or keys[0] not in structs or ".".join(keys) in engine_name:
                continue
            at = (engine_name[keys[0]], *keys[1:])
            try:
                ((_, typ, *_),) = self.rows(f"DESCRIBE SELECT {parquet_member(at)} FROM {src}")
            except duckdb.BinderException:
                continue  # no such member, or a member of something that is not a struct
            found.append((keys, str(typ), at))
        return found

    def load_parquet_as_text(
        self,
        table: str,
        paths: list[str],
        columns: list[tuple[tuple[str, ...], str, str]],
        nulls: list[str],
        taken: Collection[str] = (),
        blob_forms: Mapping[str, str] | None = None,
    ) -> dict[str, tuple[int, int, int]]:
        """Load Parquet files of one schema, in one scan, with every value as text: BLOB in the
        form ``blob_forms`` gives by internal name (``hex``, the default; ``base64``, RFC 4648
        section 4; ``uuid``: 16 bytes as 8-4-4-4-12 lower-case hex, RFC 9562 section 4, any other
        length as hex), structs, lists and maps as JSON text; a text equal to a null token is NULL.
        ``columns`` are (engine keys, type, internal name), engine keys as ``scan_parquet`` gives
        them; ``taken`` the files' own column names. The table has ``__fname``, the internal
        columns and the rows in file order; returns, per path, (rows, first rowid, last rowid)."""
        forms = blob_forms or {}

        def as_text(col: str, typ: str, name: str) -> str:
            if typ == "BLOB":
                form = forms.get(name, "hex")
                if form == "base64":
                    return f"to_base64({col})"
                if form == "uuid":
                    dashed = f"regexp_replace(lower(hex({col})), '^(.{{8}})(.{{4}})(.{{4}})(.{{4}})(.{{12}})$', '\\1-\\2-\\3-\\4-\\5')"
                    return f"CASE WHEN octet_length({col}) = 16 THEN {dashed} ELSE hex({col}) END"
                return f"hex({col})"
            if typ.startswith(("STRUCT", "MAP")) or typ.endswith("]"):
                return f"CAST(to_json({col}) AS VARCHAR)"
            if nulls and typ == "VARCHAR":
                return f"CASE WHEN {col} IN ({', '.join(lit(t) for t in nulls)}) THEN NULL ELSE {col} END"
            return f"CAST({col} AS VARCHAR)"

        # the reader adds the file's name as a column: under a name no file has
        fname = "__fname"
        while fname in taken:
            fname += "_"
        parts = "".join(f", {as_text(parquet_member(k), t, i)} AS {ident(i)}" for k, t, i in columns)
        self.con.execute(
            f"CREATE TABLE {ident(table)} AS SELECT {ident(fname)} AS __fname{parts} "
            f"FROM read_parquet([{', '.join(lit(p) for p in paths)}], filename = {lit(fname)})"
        )
        return {
            str(p): (int(n), int(lo), int(hi))
            for p, n, lo, hi in self.rows(
                f"SELECT __fname, count(*), min(rowid), max(rowid) FROM {ident(table)} GROUP BY __fname"
            )
        }

    def split_json_lines(
        self, lines: str, ok: str, malformed: str, nested: Sequence[tuple[str, ...]] = ()
    ) -> dict[int, str]:
        """Lines (``__file``, ``__row``, ``raw`` bytes) -> malformed lines appended to ``malformed``
        (not UTF-8, not RFC 8259 JSON, not an object, an object that repeats a member name at the
        top or in one of the ``nested`` objects (key paths) a mapped column is read from; blank
        lines are not records) and the JSON objects in ``ok`` (``__file``, ``__row``, ``j``).
        Returns the merged structure of each file's objects (JSON text) by file id."""
        src = ident(lines)
        from cdcnorm.types.json import (
            invalid_reason,
            json_path,
            outside_strings_of_valid,
            rfc8259,
            risky_numbers,
            tag_numbers_of_valid,
        )

        # Every check once per line, into the lines' table (the malformed and the good lines are
        # then two filters of it): the text outside strings is computed once for both lexical
        # checks and for the numbers that need tagging; the kind and the repeated names only of
        # valid JSON (the engine's JSON functions reject anything else).
        # the bytes are kept only where they are not UTF-8 (the malformed line shows them base64):
        # not a second copy of every line
        decoded = (
            f"SELECT __file, __row, line, CASE WHEN line IS NULL THEN raw END AS raw FROM (SELECT __file, __row, "
            f"rtrim(try(decode(raw)), chr(13)) AS line, raw FROM {src}) "
            "WHERE NOT regexp_full_match(coalesce(line, 'x'), '\\s*')"
        )
        # read only where json_valid holds (rfc8259 and the risky numbers of the valid lines)
        outside = f"SELECT *, {outside_strings_of_valid('line')} AS outside FROM ({decoded})"
        valid = f"coalesce({rfc8259('line', 'outside')}, FALSE)"
        strict = f"SELECT __file, __row, line, raw, {valid} AS valid, {risky_numbers('line', 'outside')} AS risky FROM ({outside})"
        kind = f"SELECT *, CASE WHEN valid THEN json_type(line) END AS kind FROM ({strict})"
        # A repeated name makes a column ambiguous: at the top level, and in every object on the
        # way to a mapped nested column (``row`` for ``row.id``); other nested values are kept as
        # written (a json field checks its own). ``repeated``: NULL, '' (the top) or the object's
        # dotted path. The names are parsed once per level.
        twice = "len({0}) <> len(list_distinct({0}))"
        repeated = f"CASE WHEN {twice.format('names')} THEN ''"
        # A member on the way that is there but is not an object (a string, a number, an array:
        # ``"after": "{...}"``, JSON encoded twice) holds nothing the mapping could read: the record
        # is malformed, with the member named, not read as though the mapped members were absent.
        # null or absent stays absent (NULL). ``astray``: NULL, or the first such member's reason.
        astray = "CAST(NULL AS VARCHAR)"
        inner = ""
        if nested:
            paths = "[" + ", ".join(lit(json_path(p)) for p in nested) + "]"
            inner = (
                f", CASE WHEN kind = 'OBJECT' THEN json_keys(line, {paths}) END AS inner_names"
                f", CASE WHEN kind = 'OBJECT' THEN json_type(line, {paths}) END AS inner_kinds"
            )
            astray = "CASE"
            for i, p in enumerate(nested, start=1):
                repeated += f" WHEN {twice.format(f'inner_names[{i}]')} THEN {lit('.'.join(p))}"
                astray += (
                    f" WHEN inner_kinds[{i}] NOT IN ('OBJECT', 'NULL') THEN 'the member ' || "
                    f"{lit('.'.join(p))} || ' is ' || {_JSON_KIND_WORDS.format(f'inner_kinds[{i}]')} || "
                    "', not an object: the mapping reads members of it'"
                )
            astray += " END"
        names = f"SELECT *, CASE WHEN kind = 'OBJECT' THEN json_keys(line) END AS names{inner} FROM ({kind})"
        dropped = "names, inner_names, inner_kinds" if nested else "names"
        self.con.execute(
            f"CREATE OR REPLACE TABLE {ident(lines + '_text')} AS SELECT * EXCLUDE ({dropped}), "
            f"{repeated} END AS repeated, {astray} AS astray FROM ({names})"
        )
        text = ident(lines + "_text")
        self.con.execute(
            f"INSERT INTO {ident(malformed)} SELECT __file, __row, "
            "CASE WHEN line IS NULL THEN to_base64(raw) ELSE line END, "
            "CASE WHEN line IS NULL THEN 'not UTF-8 (text shown base64)' "
            f"WHEN NOT valid THEN {invalid_reason('line')} "
            "WHEN kind <> 'OBJECT' THEN 'not a JSON object' "
            "WHEN repeated = '' THEN 'the object repeats a member name (RFC 7493 section 2.3): which value is meant is unclear' "
            "WHEN repeated IS NOT NULL THEN 'the object ' || repeated || ' repeats a member name (RFC 7493 section 2.3): which value is meant is unclear' "
            "ELSE astray "
            f"END FROM {text} WHERE line IS NULL OR NOT valid OR kind <> 'OBJECT' OR repeated IS NOT NULL "
            "OR astray IS NOT NULL"
        )
        # the lines with a number the parser could re-spell are tagged, the others kept as they are:
        # two filters, not a CASE (the tagging's lambdas took twice as long inside one)
        good = "valid AND kind = 'OBJECT' AND repeated IS NULL AND astray IS NULL"
        self.con.execute(
            f"CREATE OR REPLACE TABLE {ident(ok)} AS SELECT __file, __row, "
            f"CAST({tag_numbers_of_valid('line', self.number_tag)} AS JSON) AS j FROM {text} "
            f"WHERE {good} AND coalesce(risky, TRUE) UNION ALL SELECT __file, __row, CAST(line AS JSON) AS j "
            f"FROM {text} WHERE {good} AND NOT coalesce(risky, TRUE)"
        )
        self.drop(lines + "_text")
        # The merged structure of one object per distinct structure: the same as of every object
        # (an object adds only its structure to the merge), but json_group_structure keeps every
        # object it merges in memory the engine cannot spill (about 1.3 KiB per object here: 3 GB
        # at 2.5M lines), while a row's own structure is computed and grouped within the limit.
        return {
            int(file_id): str(structure)
            for file_id, structure in self.rows(
                f"SELECT __file, json_group_structure(one) FROM (SELECT __file, any_value(j) AS one "
                f"FROM {ident(ok)} GROUP BY __file, json_structure(j)) GROUP BY __file"
            )
            if structure is not None
        }

    def json_columns(
        self,
        table: str,
        ok: str,
        paths: list[tuple[str, str, list[int] | None]],
        nulls: list[str],
        meta: dict[int, str] | None = None,
    ) -> None:
        """JSON objects -> one text column per (JSON path, internal name, the ids of the files
        that have the column, or None for every file: another file's rows have no value in it);
        a string equal to a null token is NULL; objects and arrays stay JSON text. ``meta``: the
        quarantine's ``_cdcnorm`` member of each file that has one (file id -> its name)."""
        from cdcnorm.types.json import json_path, untag

        # every path in one extraction (the object is parsed once, not once per column)
        listed = "[" + ", ".join(lit(path) for path, _, _ in paths) + "]"
        parts = []
        for i, (_, col, having) in enumerate(paths, start=1):
            v = untag(f"o.__cells[{i}]", self.number_tag)
            if nulls:
                v = f"CASE WHEN {v} IN ({', '.join(lit(t) for t in nulls)}) THEN NULL ELSE {v} END"
            if having is not None:
                v = f"CASE WHEN o.__file IN ({', '.join(map(str, having))}) THEN {v} END"
            parts.append(f", {v} AS {ident(col)}")
        # A quarantine line fed back keeps the bytes of cells that were not UTF-8 under
        # _cdcnorm.raw_base64, the cell itself null: while it is still null (not fixed), the cell
        # is again not UTF-8, with the same bytes, so the row is quarantined again, not loaded as NULL.
        # Only those (few) objects are looked at: the subquery would otherwise run for every row.
        by_file = " ".join(
            f"WHEN {i} THEN json_extract(j, {lit(json_path((name, 'raw_base64')))})"
            for i, name in (meta or {}).items()
        )
        rb = f"CASE __file {by_file} END" if by_file else "CAST(NULL AS JSON)"
        enc = (
            f"SELECT __file, __row, (SELECT CASE WHEN count(*) > 0 THEN "
            f"CAST(to_json(map(list(k), list(json_extract_string({rb}, k)))) AS VARCHAR) END "
            f"FROM unnest(json_keys({rb})) t(k) WHERE coalesce(json_type(json_extract(j, k)), 'NULL') = 'NULL') AS __enc "
            f"FROM {ident(ok)} WHERE json_type({rb}) = 'OBJECT'"
        )
        cells = f"json_extract_string(j, {listed})" if paths else "CAST([] AS VARCHAR[])"
        self.con.execute(
            f"CREATE TABLE {ident(table)} AS SELECT CAST(o.__file AS INTEGER) AS __file, o.__row, "
            f"e.__enc{''.join(parts)} FROM (SELECT __file, __row, {cells} AS __cells FROM {ident(ok)}) o "
            f"LEFT JOIN ({enc}) e ON e.__file = o.__file AND e.__row = o.__row"
        )


#: A value's JSON kind (the engine's json_type) in words, for messages: ``{}`` is the kind.
_JSON_KIND_WORDS = (
    "CASE {0} WHEN 'VARCHAR' THEN 'a string' WHEN 'ARRAY' THEN 'an array' WHEN 'BOOLEAN' THEN "
    "'true or false' ELSE 'a number' END"
)

#: what engines/__init__.py looks up by the name "duckdb"
ENGINE = DuckDBEngine
