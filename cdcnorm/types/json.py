"""JSON values: only RFC 8259 text is valid, and a value is kept as written.

The engine's JSON parser is lenient: it takes ``NaN``, ``Infinity`` and
trailing commas (``[1,]``), and re-renders numbers (``1e2`` as ``100.0``,
``0.1000000000000000055511151231257827`` as ``0.1``, ``1.50`` as ``1.5``).
So validity is the parser's check plus two lexical ones on the text outside
strings (no trailing comma; no letters other than ``true``, ``false``,
``null`` and a number's exponent), and a value is minified by dropping only
the whitespace between tokens, never re-rendered: its numbers keep their
digits. Member names must be unique in every object (RFC 7493 section 2.3
says MUST NOT repeat; RFC 8259 section 4 says SHOULD, as the names then
mean different things to different readers): a value with a repeated name
is quarantined.
"""

from __future__ import annotations

import json
import secrets

from cdcnorm.types.base import FieldType

#: A JSON string token (RFC 8259 section 7), for the engine's regular expressions.
STRING = r'"(?:[^"\\]|\\.)*"'
_NUMBER = r"-?[0-9]+(\.[0-9]+)?([eE][+-]?[0-9]+)?"


def json_path(keys: tuple[str, ...]) -> str:
    """The JSONPath of a member reached by these keys from the top (each key quoted)."""
    return "$" + "".join("." + json.dumps(k) for k in keys)


def outside_strings(x: str) -> str:
    """SQL: the text with every string token emptied (what the lexical checks below read)."""
    return f"regexp_replace({x}, '{STRING}', '\"\"', 'g')"


def outside_strings_of_valid(x: str) -> str:
    """SQL: ``outside_strings(x)`` for a text the engine's ``json_valid`` takes, at less than half
    its cost (no regular expression): escaped backslashes and quotes, which a valid text has only
    inside strings, are removed, and the text is cut at its quotes: every other piece is outside.
    For any other text the result differs, and nothing may read it (``rfc8259`` requires both)."""
    unescaped = f"replace(replace({x}, '\\\\', ''), '\\\"', '')"
    pieces = f"string_split({unescaped}, '\"')"
    return f"array_to_string(list_filter({pieces}, lambda piece, i: i % 2 = 1), '\"\"')"


def trailing_comma(x: str, outside: str | None = None) -> str:
    """``outside``: SQL of ``outside_strings(x)`` already computed (the text is then not read)."""
    return f"regexp_matches({outside or outside_strings(x)}, ',\\s*[\\]}}]')"


def bare_words(x: str, outside: str | None = None) -> str:
    """SQL: the text has a word JSON does not know outside its strings (NaN, Infinity, ...)."""
    text = outside or outside_strings(x)
    rest = f"regexp_replace(regexp_replace({text}, 'true|false|null', '', 'g'), '{_NUMBER}', '0', 'g')"
    # a text without a letter outside its strings has no word at all: the two replacements only
    # run on the others (CASE evaluates a branch for its rows alone; 0.07 s less per 500k lines)
    return (
        f"CASE WHEN regexp_matches({text}, '[A-Za-z]') THEN regexp_matches({rest}, '[A-Za-z]') ELSE FALSE END"
    )


def rfc8259(x: str, outside: str | None = None) -> str:
    """SQL: ``x`` is a JSON text by RFC 8259 (the engine's check made strict); ``outside`` as above."""
    return f"(json_valid({x}) AND NOT {trailing_comma(x, outside)} AND NOT {bare_words(x, outside)})"


def repeated_name(x: str) -> str:
    """SQL: some object in the (valid) JSON text ``x`` repeats a member name."""
    return (
        "(SELECT count(*) <> count(DISTINCT (parent, key)) FROM json_tree("
        f"CASE WHEN json_valid({x}) THEN {x} ELSE 'null' END) "
        "WHERE key IS NOT NULL AND NOT ends_with(fullkey, ']'))"
    )


#: Why the engine refuses a text that escapes half of a surrogate pair alone (``"\ud800"``):
#: RFC 8259 section 8.2 allows it by the grammar and leaves its meaning unpredictable; I-JSON,
#: RFC 7493 section 2.1, forbids it (both from memory).
LONE_SURROGATE = (
    "a \\u escape of half a surrogate pair alone (D800-DFFF): RFC 8259 section 8.2 leaves its meaning "
    "unpredictable, RFC 7493 section 2.1 forbids it"
)


def lone_surrogate(x: str) -> str:
    """SQL: the JSON text ``x`` has a ``\\u`` escape of a surrogate that is not half of a pair
    (a high one, D800-DBFF, followed by a low one, DC00-DFFF). Escaped backslashes are removed first,
    so ``\\\\ud800`` (a backslash, then the letters) is not one."""
    unescaped = f"replace({x}, '\\\\', '')"
    pair = r"\\u[dD][89abAB][0-9a-fA-F]{2}\\u[dD][c-fC-F][0-9a-fA-F]{2}"
    return f"regexp_matches(regexp_replace({unescaped}, '{pair}', '', 'g'), '\\\\u[dD][89a-fA-F][0-9a-fA-F]{{2}}')"


def invalid_reason(x: str) -> str:
    """SQL: why the engine's parser refuses the text ``x``."""
    return f"CASE WHEN {lone_surrogate(x)} THEN 'not valid JSON here: {LONE_SURROGATE}' ELSE 'not valid JSON (RFC 8259)' END"


def minify(x: str) -> str:
    """SQL: the JSON text without the whitespace between its tokens; tokens kept as written."""
    return f"array_to_string(regexp_extract_all({x}, '{STRING}|[^\\s\"]+'), '')"


class JsonType(FieldType):
    """A JSON text (RFC 8259), embedded in the envelope as JSON: minified, its tokens as written."""

    name = "json"
    free_text = True
    sql_type = "JSON"

    def cast(self, x: str) -> str:
        return f"CASE WHEN {rfc8259(x)} AND NOT {repeated_name(x)} THEN CAST({minify(x)} AS JSON) END"

    def explain(self, x: str) -> str:
        return (
            f"CASE WHEN NOT json_valid({x}) THEN {invalid_reason(x)} "
            f"WHEN {bare_words(x)} THEN 'not valid JSON (RFC 8259): NaN, Infinity and other bare words are not JSON values' "
            f"WHEN {trailing_comma(x)} THEN 'not valid JSON (RFC 8259): a comma before ] or }}' "
            "ELSE 'an object repeats a member name (RFC 7493 section 2.3; its meaning would depend on the reader)' END"
        )


class RawJson:
    """Splices JSON values into JSON lines as written: the engine's ``to_json`` would re-render
    their numbers. A value is first written as a placeholder string unique to this writing (a
    random 128-bit token), then the placeholder's quoted form is replaced by the value's text."""

    def __init__(self) -> None:
        self.token = secrets.token_hex(16)
        self.columns: list[str] = []

    def placeholder(self, column: str) -> str:
        """SQL for the envelope: the placeholder of a JSON value (NULL stays NULL)."""
        self.columns.append(column)
        return f"CASE WHEN {column} IS NULL THEN NULL ELSE '{self._mark(column)}' END"

    def _mark(self, column: str) -> str:
        return f"cdcnorm-json-{self.token}-{column}"

    def line(self, members: list[tuple[str, str]]) -> str:
        """SQL: one JSON object text of (name, SQL) members, its JSON values spliced in as written."""
        from cdcnorm.sql import lit

        return self.splice(
            "CAST(to_json({" + ", ".join(f"{lit(n)}: {e}" for n, e in members) + "}) AS VARCHAR)"
        )

    def splice(self, line: str) -> str:
        """SQL: the JSON line with every placeholder replaced by its value's text."""
        for column in self.columns:
            line = f"replace({line}, '\"{self._mark(column)}\"', coalesce(CAST({column} AS VARCHAR), 'null'))"
        return line


#: A JSON number token: RFC 8259 section 6 (the text is already known to be valid JSON).
_NUMBER_TOKEN = "-?[0-9][0-9.eE+-]*"


def risky_numbers(line: str, outside: str | None = None) -> str:
    """SQL: the text has a number the engine could re-render (see ``tag_numbers``): the lines
    without one need no tagging."""
    return f"regexp_matches({outside or outside_strings(line)}, '[0-9][.eE]|-0|[0-9]{{19,}}')"


def tag_numbers(text: str, tag: str) -> str:
    """SQL: the JSON text with every number token outside strings made a string ``"<tag><token>"``,
    so the engine's parser hands the token back as written (it would re-render ``1e2`` as
    ``100.0``, ``-0`` as ``0`` and a long fraction through a double), found by a regular
    expression over the whole text: right for any text, and the reference that
    ``tag_numbers_of_valid`` is tested against."""
    tokens = f"regexp_extract_all({text}, '{STRING}|{_NUMBER_TOKEN}|[^\"0-9-]+|-')"
    return (
        f"array_to_string(list_transform({tokens}, lambda t: CASE WHEN regexp_full_match(t, '{_NUMBER_TOKEN}') "
        f"THEN '\"{tag}' || t || '\"' ELSE t END), '')"
    )


def tag_numbers_of_valid(text: str, tag: str) -> str:
    """SQL: ``tag_numbers`` for a text the engine's ``json_valid`` takes, at a fifth of its cost: a regular expression over the whole text costs about 12 s per million
    300-byte lines, this about 2.5 s. Escaped backslashes and quotes (which a valid text has only
    inside strings) are set aside as the control characters U+0002 and U+0001, which a valid text
    holds nowhere unescaped (``json_valid`` refuses them, and the engine's ``to_json`` escapes
    them); the text is cut at its quotes, and only the pieces outside strings are searched for
    numbers. (A CASE choosing another way for other texts doubled the cost: the engine's lambdas
    run slower inside one.)"""
    set_aside = f"replace(replace({text}, '\\\\', chr(2)), '\\\"', chr(1))"
    pieces = f"string_split({set_aside}, '\"')"
    tagged = (
        f"array_to_string(list_transform({pieces}, lambda piece, i: CASE WHEN i % 2 = 1 THEN "
        f"regexp_replace(piece, '{_NUMBER_TOKEN}', '\"{tag}\\0\"', 'g') ELSE piece END), '\"')"
    )
    return f"replace(replace({tagged}, chr(1), '\\\"'), chr(2), '\\\\')"


def untag(value: str, tag: str) -> str:
    """SQL: a value extracted from a tagged text, its numbers as written again: a number itself,
    or an object or array (JSON text) holding tagged numbers."""
    return (
        f"CASE WHEN starts_with({value}, '{tag}') THEN substr({value}, {len(tag) + 1}) "
        f"WHEN contains({value}, '{tag}') THEN regexp_replace({value}, '\"{tag}([^\"]*)\"', '\\1', 'g') "
        f"ELSE {value} END"
    )
