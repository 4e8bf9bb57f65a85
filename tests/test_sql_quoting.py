"""Quoting names and values from user files (``cdcnorm.sql``): the one way they become SQL.

The references are sqlglot's own writer for DuckDB (``exp.to_identifier``, ``exp.Literal.string``)
and the engine itself: every text, quoted, must come back from DuckDB unchanged.
"""

from __future__ import annotations

import duckdb
from hypothesis import given, settings
from hypothesis import strategies as st
from sqlglot import exp

from cdcnorm.sql import PLAN_DIALECT, ident, lit

#: Any text but NUL, which no SQL text may hold, and lone surrogates, which are not text (no
#: name or value from a dump is one: bytes that do not decode never become SQL); quotes,
#: backslashes and line breaks made likely.
TEXT = st.text(
    alphabet=st.one_of(
        st.sampled_from(["'", '"', "\\", "\n", "\r", "$", ";", "é", "😀"]),
        st.characters(exclude_characters="\x00", exclude_categories=("Cs",)),
    ),
    max_size=40,
)


@settings(max_examples=300, deadline=None)
@given(TEXT)
def test_lit_and_ident_write_what_sqlglot_writes(text: str) -> None:
    # reference: sqlglot's DuckDB writer
    assert lit(text) == exp.Literal.string(text).sql(PLAN_DIALECT)
    assert ident(text) == exp.to_identifier(text, quoted=True).sql(PLAN_DIALECT)


@settings(max_examples=200, deadline=None)
@given(TEXT.filter(bool))
def test_the_engine_reads_quoted_text_back_unchanged(text: str) -> None:
    # reference: DuckDB parses the literal back to the same text, and names a column by the identifier
    con = duckdb.connect()
    (value,) = con.execute(f"SELECT {lit(text)}").fetchone() or (None,)
    assert value == text
    assert con.execute(f"SELECT 1 AS {ident(text)}").description[0][0] == text
