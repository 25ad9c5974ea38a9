"""Landmark protocols to and from CSV and JSON: round trips, and errors that name the spot.

CSV quoting follows RFC 4180 (Shafranovich 2005, section 2: fields with commas, quotes or
line breaks are enclosed in double quotes; a quote inside is doubled); JSON follows
RFC 8259. A UTF-8 byte-order mark at the start of a CSV file (what spreadsheet programs
write) is common practice and is accepted.
"""

from __future__ import annotations

import csv
import io
import json

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from studies.services.protocol_io import (
    COLUMNS,
    ProtocolFormatError,
    parse_protocol,
    parse_protocol_csv,
    parse_protocol_json,
    protocol_to_csv,
    protocol_to_json,
)
from studies.services.studies import set_protocol

codes = st.from_regex(r"[A-Za-z0-9][A-Za-z0-9_.\-]{0,15}", fullmatch=True)
# Printable text with the characters CSV must quote: commas, quotes, line breaks.
texts = st.text(
    alphabet=st.characters(blacklist_categories=("Cs", "Cc"), blacklist_characters="\x00")
    | st.sampled_from([",", '"', "\n", "\r", ";", "é", "µ"]),
    max_size=40,
).map(str.strip)
items = st.lists(
    st.fixed_dictionaries(
        {
            "code": codes,
            "name": texts.filter(bool),
            "description": texts,
            "may_be_absent": st.booleans(),
            "order": st.integers(min_value=0, max_value=10_000),
        }
    ),
    min_size=1,
    max_size=12,
    unique_by=lambda item: item["code"],
)


@settings(max_examples=60, deadline=None, derandomize=True)
@given(items)
def test_it_round_trips_any_protocol_through_csv(protocol) -> None:
    """items -> CSV -> items is the identity (RFC 4180 quoting of , " and line breaks)."""
    assert parse_protocol_csv(protocol_to_csv(protocol)) == protocol


@settings(max_examples=60, deadline=None, derandomize=True)
@given(items)
def test_it_round_trips_any_protocol_through_json(protocol) -> None:
    """items -> JSON -> items is the identity, header fields and all (RFC 8259)."""
    text = protocol_to_json(protocol, study="s", protocol_version=3)
    assert parse_protocol_json(text) == protocol
    assert json.loads(text)["protocol_version"] == 3


def test_it_reads_a_hand_written_rfc_4180_file() -> None:
    """Quoted comma, doubled quote, a line break inside quotes, CRLF endings, a BOM, and a
    file with only the required column elsewhere: values as RFC 4180 section 2 defines."""
    text = (
        "\ufeffcode,name,description,may_be_absent,order\r\n"
        'N1,"Nasion, soft tissue","The ""deepest"" point",no,2\r\n'
        'S,Sella,"Centre of the\r\npituitary fossa",YES,1\r\n'
        "\r\n"
        "PNS,Posterior nasal spine,,,\r\n"
    )
    assert parse_protocol_csv(text) == [
        {
            "code": "N1",
            "name": "Nasion, soft tissue",
            "description": 'The "deepest" point',
            "may_be_absent": False,
            "order": 2,
        },
        {
            "code": "S",
            "name": "Sella",
            "description": "Centre of the\r\npituitary fossa",
            "may_be_absent": True,
            "order": 1,
        },
        {
            "code": "PNS",
            "name": "Posterior nasal spine",
            "description": "",
            "may_be_absent": False,
            "order": 2,
        },
    ]
    assert parse_protocol_csv("code\nA\nB\n") == [
        {"code": "A", "name": "A", "description": "", "may_be_absent": False, "order": 0},
        {"code": "B", "name": "B", "description": "", "may_be_absent": False, "order": 1},
    ]


def test_it_writes_the_header_and_yes_no_flags() -> None:
    """The exported CSV is readable by the standard library's csv module as a table."""
    text = protocol_to_csv(
        [{"code": "A", "name": "Point, A", "description": "", "may_be_absent": True, "order": 0}]
    )
    rows = list(csv.reader(io.StringIO(text)))
    assert rows == [list(COLUMNS), ["A", "Point, A", "", "yes", "0"]]


@pytest.mark.parametrize(
    ("text", "where", "quoted"),
    [
        (
            "code,name,may_be_absent\nA,a,no\nB,b,maybe\n",
            "line 3, column 'may_be_absent'",
            "'maybe'",
        ),
        ("code,order\nA,1\nB,-4\n", "line 3, column 'order'", "'-4'"),
        ("code,order\nA,1.5\n", "line 2, column 'order'", "'1.5'"),
        ("code,name\nA,a\n,no code\n", "line 3, column 'code'", "needs a code"),
        ("code,name\nA,a\nB b,x\n", "line 3, column 'code'", "'B b'"),
        ('code,name\nA,"a\nwith break"\nA,again\n', "line 4, column 'code'", "first at line 2"),
        ("code,colour\nA,red\n", "line 1", "'colour'"),
        ("name\nA\n", "line 1", "'code'"),
        ("code,name\nA,a,extra\n", "line 2", "3 values"),
        ('code,name\nA,"unterminated\n', "line 2", "unexpected end of data"),
        ("", "empty", "header"),
        ("code,name\n\n", "no landmarks", ""),
    ],
)
def test_it_names_the_row_and_column_of_a_bad_csv_value(text, where, quoted) -> None:
    with pytest.raises(ProtocolFormatError) as caught:
        parse_protocol_csv(text)
    assert where in str(caught.value) and quoted in str(caught.value)


@pytest.mark.parametrize(
    ("text", "where", "quoted"),
    [
        ('[{"code": "A"}, {"code": "B", "order": "two"}]', "item 2, field 'order'", "'two'"),
        ('[{"code": "A"}, {"code": "A"}]', "item 2, field 'code'", "first at item 1"),
        ('{"landmarks": [{"code": "A", "shape": "round"}]}', "item 1, field 'shape'", "unknown"),
        ('[{"code": "A", "may_be_absent": "often"}]', "item 1, field 'may_be_absent'", "'often'"),
        ('[{"code": "A", "name": ["x"]}]', "item 1, field 'name'", "['x']"),
        ('[{"code": "A"}, 7]', "item 2", "7"),
        ('{"code": "A"}', '"landmarks"', ""),
        ('"A"', "list of landmarks", "str"),
        ('[{"code": "A",}]', "line 1, column 15", "not valid JSON"),
        ("[]", "no landmarks", ""),
    ],
)
def test_it_names_the_item_and_field_of_a_bad_json_value(text, where, quoted) -> None:
    with pytest.raises(ProtocolFormatError) as caught:
        parse_protocol_json(text)
    assert where in str(caught.value) and quoted in str(caught.value)


def test_it_refuses_an_unknown_format() -> None:
    with pytest.raises(ProtocolFormatError, match="'xml'"):
        parse_protocol("<landmarks/>", "xml")


def test_it_is_a_value_error_the_services_and_pages_already_handle() -> None:
    assert issubclass(ProtocolFormatError, ValueError)


def test_it_stores_an_imported_protocol_and_exports_the_same(db, cast) -> None:
    """parse -> set_protocol -> rows -> export gives back the file's landmarks."""
    from studies.services import protocol_io, studies

    study = studies.create_study(name="IO", slug="io", coordinator=cast["pi"])
    text = "code,name,may_be_absent,order\nB,Point B,yes,1\nA,Point A,no,0\n"
    set_protocol(study, parse_protocol_csv(text))
    exported = protocol_io.protocol_to_csv(protocol_io.landmark_items(study.current_landmarks()))
    assert parse_protocol_csv(exported) == sorted(
        parse_protocol_csv(text), key=lambda item: item["order"]
    )
