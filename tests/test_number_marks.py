"""Numbers written with a decimal comma or group marks (``decimal_mark``, ``group_mark``).

Oracle: Python's own grouping (the format specification's ``,`` option, PEP 378) writes each
number with a comma between groups of three digits and a point before the fraction; the marks
are then swapped as an export in another convention writes them; Python's ``decimal`` is the
value."""

from __future__ import annotations

from decimal import Decimal

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import ValidationError

from cdcnorm.mapping.model import FieldSpec
from tests.conftest import ConvertFn
from tests.typing_helper import type_values, typed_text

#: (decimal mark, group mark): German and Danish exports, French (a narrow no-break space, or a
#: no-break space), Swiss, English reports, and a decimal comma without grouping
CONVENTIONS = [(",", "."), (",", "\u202f"), (",", "\u00a0"), (".", "'"), (".", ","), (",", None)]


def _written(number: Decimal, decimal: str, group: str | None) -> str:
    """``number`` as Python groups it (``1,234,567.5``), then in the convention's marks."""
    text = format(number, ",") if group else str(number)
    return text.replace(",", "\0").replace(".", decimal).replace("\0", group or "")


@settings(max_examples=300, deadline=None)
@given(
    st.decimals(min_value=-(10**12), max_value=10**12, places=2, allow_nan=False, allow_infinity=False),
    st.sampled_from(CONVENTIONS),
)
def test_a_number_in_another_convention_is_the_value_python_writes(
    number: Decimal, marks: tuple[str, str | None]
) -> None:
    decimal, group = marks
    text = _written(number, decimal, group)
    spec = {"decimal_mark": decimal, "group_mark": group}
    value, reason = typed_text({"type": "decimal(16,2)"} | spec, text)
    assert reason is None and Decimal(str(value)) == number, (text, value, reason)
    as_float, reason = typed_text({"type": "float"} | spec, text)
    assert reason is None and as_float == float(number), (text, as_float)
    whole = number.to_integral_value()
    value, reason = typed_text({"type": "integer", "group_mark": group}, _written(whole, decimal, group))
    assert reason is None and value == int(whole), (whole, value, reason)


def test_a_mark_out_of_place_is_quarantined_never_guessed(convert: ConvertFn) -> None:
    """1,5 where the point is the decimal mark, 12.34 where the point groups digits: either could
    be read, and read wrong; each is quarantined, with the marks the field expects."""
    texts = ["1.234,56", "12.34", "1.234.5", "1,234.56", "1.2345,6", "1.234,567", "-.5", ",5", "1.234.567"]
    got = type_values(convert, "{type: 'decimal(12,2)', decimal_mark: ',', group_mark: '.'}", texts)
    why = 'not a decimal number written with "," as its decimal mark and "." between groups of three digits'
    assert got == [
        ("1234.56", None),
        (None, why),
        (None, why),
        (None, why),
        (None, why),
        (None, "more than 2 fractional digits (would round)"),
        (None, why),
        ("0.50", None),
        ("1234567.00", None),
    ]
    plain = type_values(
        convert, "{type: integer, group_mark: ' '}", ["1 234 567", "12 34", "1234", "1 234,5"]
    )
    assert [v for v, _ in plain] == [1234567, None, 1234, None]
    assert plain[1][1] == "not an integer written with a space between groups of three digits"


@pytest.mark.parametrize(
    ("spec", "message"),
    [
        ({"type": "decimal(12,2)", "group_mark": "."}, "is the decimal mark too"),
        ({"type": "float", "decimal_mark": ",", "group_mark": ","}, "is the decimal mark too"),
        ({"type": "integer", "decimal_mark": ","}, "decimal_mark applies to decimal and float fields only"),
        (
            {"type": "text", "group_mark": "."},
            "group_mark applies to integer and decimal and float fields only",
        ),
        ({"type": "decimal(12,2)", "decimal_mark": ";"}, "decimal_mark"),
    ],
)
def test_marks_that_cannot_be_told_apart_are_refused(spec: dict[str, str], message: str) -> None:
    with pytest.raises(ValidationError) as caught:
        FieldSpec(**spec)  # type: ignore[arg-type]
    assert message in str(caught.value)
