from __future__ import annotations

from cdcnorm.types.base import FieldType

#: What PostgreSQL's boolean input reads (its documentation, "Boolean Type": true/yes/on/1 and
#: false/no/off/0, case-insensitive, with leading and trailing whitespace ignored, and "unique
#: prefixes of these strings are also accepted"): t tr tru true, y ye yes, on, 1; f fa fal fals
#: false, n no, of off, 0 ("o" alone is no prefix of one word only). tests/test_types.py holds
#: every spelling against a real PostgreSQL server.
TRUE = "('t', 'tr', 'tru', 'true', 'y', 'ye', 'yes', 'on', '1')"
FALSE = "('f', 'fa', 'fal', 'fals', 'false', 'n', 'no', 'of', 'off', '0')"
#: the whitespace PostgreSQL ignores around a boolean (C's isspace: space, tab, LF, VT, FF, CR)
SPACE = "' ' || chr(9) || chr(10) || chr(11) || chr(12) || chr(13)"


class BooleanType(FieldType):
    """What PostgreSQL's boolean input reads: true/false, yes/no, on/off, 1/0 in any case, or a
    prefix of one word only (t, f, y, n), whitespace around it ignored."""

    name = "boolean"
    sql_type = "BOOLEAN"

    def cast(self, x: str) -> str:
        # the text as it is first: trimming a list of characters costs the engine five times what
        # the rest does (0.14 s against 0.03 s per 1M values), and a dump's flags rarely need it
        word, trimmed = f"lower({x})", f"lower(trim({x}, {SPACE}))"
        return (
            f"CASE WHEN {word} IN {TRUE} THEN TRUE WHEN {word} IN {FALSE} THEN FALSE "
            f"WHEN {trimmed} IN {TRUE} THEN TRUE WHEN {trimmed} IN {FALSE} THEN FALSE END"
        )

    def explain(self, x: str) -> str:
        return "'not a boolean: true/false, yes/no, on/off, 1/0 (any case), or t, f, y, n'"
