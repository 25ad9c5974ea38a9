"""A landmark protocol to and from CSV and JSON files.

Both formats carry the same five fields per landmark: code, name, description,
may_be_absent, order. Parsing checks every row before returning anything, and an error
names the row (CSV: the line number in the file, header = line 1; JSON: the 1-based
item number) and the column, and quotes the offending value. Parsed items are plain
dicts in the shape `services.studies.set_protocol` takes, so importing is parse, then
set_protocol: nothing is stored when parsing fails.
"""

from __future__ import annotations

import csv
import io
import json
import re
from collections.abc import Iterable, Sequence

from ..models import Landmark
from .errors import ServiceError

__all__ = [
    "COLUMNS",
    "ProtocolFormatError",
    "landmark_items",
    "parse_protocol",
    "parse_protocol_csv",
    "parse_protocol_json",
    "protocol_to_csv",
    "protocol_to_json",
]

COLUMNS = ("code", "name", "description", "may_be_absent", "order")
REQUIRED = ("code",)
FORMATS = ("csv", "json")
CODE_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]*$")
CODE_MAX = 32  # Landmark.code max_length
NAME_MAX = 200  # Landmark.name max_length
_TRUE = {"1", "true", "yes", "y"}
_FALSE = {"0", "false", "no", "n", ""}


class ProtocolFormatError(ServiceError):
    """A protocol file that cannot be read; the message names the row and column."""


def _where(row: str, column: str) -> str:
    kind = "field" if row.startswith("item") else "column"
    return f"{row}, {kind} {column!r}"


def _code(value: object, where: str) -> str:
    code = str(value if value is not None else "").strip()
    if not code:
        raise ProtocolFormatError(f"{where}: every landmark needs a code")
    if len(code) > CODE_MAX or not CODE_PATTERN.match(code):
        raise ProtocolFormatError(
            f"{where}: code {code!r} must be 1 to {CODE_MAX} letters, digits, '_', '-' or '.',"
            " starting with a letter or digit"
        )
    return code


def _flag(value: object, where: str) -> bool:
    if isinstance(value, bool):
        return value
    if value is None:
        return False
    text = str(value).strip().lower()
    if text in _TRUE:
        return True
    if text in _FALSE:
        return False
    raise ProtocolFormatError(f"{where}: {value!r} is not yes/no (use yes, no, true, false, 1, 0)")


def _order(value: object, where: str, default: int) -> int:
    if value is None or (isinstance(value, str) and not value.strip()):
        return default
    if isinstance(value, bool) or (isinstance(value, float) and not value.is_integer()):
        raise ProtocolFormatError(f"{where}: order must be a whole number >= 0, got {value!r}")
    try:
        number = int(str(value).strip()) if isinstance(value, str) else int(value)
    except (TypeError, ValueError):
        raise ProtocolFormatError(
            f"{where}: order must be a whole number >= 0, got {value!r}"
        ) from None
    if number < 0:
        raise ProtocolFormatError(f"{where}: order must be a whole number >= 0, got {value!r}")
    return number


def _text(value: object, where: str, limit: int | None = None) -> str:
    if value is None:
        return ""
    if not isinstance(value, str | int | float) or isinstance(value, bool):
        raise ProtocolFormatError(f"{where}: expected text, got {value!r}")
    text = str(value).strip()
    if limit is not None and len(text) > limit:
        raise ProtocolFormatError(f"{where}: longer than {limit} characters ({len(text)})")
    return text


def _item(fields: dict, row: str, position: int) -> dict:
    code = _code(fields.get("code"), _where(row, "code"))
    return {
        "code": code,
        "name": _text(fields.get("name"), _where(row, "name"), NAME_MAX) or code,
        "description": _text(fields.get("description"), _where(row, "description")),
        "may_be_absent": _flag(fields.get("may_be_absent"), _where(row, "may_be_absent")),
        "order": _order(fields.get("order"), _where(row, "order"), position),
    }


def _no_duplicates(items: list[dict], rows: list[str]) -> list[dict]:
    if not items:
        raise ProtocolFormatError("the file holds no landmarks")
    first: dict[str, str] = {}
    for item, row in zip(items, rows, strict=True):
        if item["code"] in first:
            raise ProtocolFormatError(
                f"{_where(row, 'code')}: duplicate landmark code {item['code']!r} "
                f"(first at {first[item['code']]})"
            )
        first[item["code"]] = row
    return items


def parse_protocol_csv(text: str) -> list[dict]:
    """Landmark items from CSV text with a header row naming some of COLUMNS.

    `code` is required; a missing name defaults to the code, order to the row position
    (0-based), may_be_absent to no. Unknown columns are refused.
    """
    text = text.lstrip("\ufeff")
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    try:
        header = next(reader)
    except StopIteration:
        raise ProtocolFormatError("the CSV file is empty (expected a header row)") from None
    except csv.Error as error:
        raise ProtocolFormatError(f"line 1: {error}") from None
    names = [column.strip().lower() for column in header]
    unknown = [column for column in names if column not in COLUMNS]
    if unknown:
        raise ProtocolFormatError(
            f"line 1: unknown column {unknown[0]!r}; the columns are {', '.join(COLUMNS)}"
        )
    missing = [column for column in REQUIRED if column not in names]
    if missing:
        raise ProtocolFormatError(f"line 1: the header needs a {missing[0]!r} column")
    repeated = sorted({column for column in names if names.count(column) > 1})
    if repeated:
        raise ProtocolFormatError(f"line 1: column {repeated[0]!r} appears more than once")
    items: list[dict] = []
    rows: list[str] = []
    last_line = reader.line_num
    try:
        for values in reader:
            # A quoted value may span lines: name the line on which the record starts.
            row, last_line = f"line {last_line + 1}", reader.line_num
            if not any(value.strip() for value in values):
                continue
            if len(values) > len(names):
                raise ProtocolFormatError(
                    f"{row}: {len(values)} values but the header has {len(names)} columns"
                )
            fields = dict(zip(names, values, strict=False))
            items.append(_item(fields, row, len(items)))
            rows.append(row)
    except csv.Error as error:
        raise ProtocolFormatError(f"line {last_line + 1}: {error}") from None
    return _no_duplicates(items, rows)


def parse_protocol_json(text: str) -> list[dict]:
    """Landmark items from JSON: a list of objects, or an object with a "landmarks" list."""
    try:
        data = json.loads(text)
    except json.JSONDecodeError as error:
        raise ProtocolFormatError(
            f"not valid JSON: {error.msg} at line {error.lineno}, column {error.colno}"
        ) from None
    if isinstance(data, dict):
        if "landmarks" not in data:
            raise ProtocolFormatError('a JSON object needs a "landmarks" list')
        data = data["landmarks"]
    if not isinstance(data, list):
        raise ProtocolFormatError(f"expected a list of landmarks, got {type(data).__name__}")
    items: list[dict] = []
    rows: list[str] = []
    for number, fields in enumerate(data, start=1):
        row = f"item {number}"
        if not isinstance(fields, dict):
            raise ProtocolFormatError(f"{row}: expected an object, got {fields!r}")
        unknown = sorted(set(fields) - set(COLUMNS))
        if unknown:
            raise ProtocolFormatError(
                f"{_where(row, unknown[0])}: unknown field; the fields are {', '.join(COLUMNS)}"
            )
        items.append(_item(fields, row, len(items)))
        rows.append(row)
    return _no_duplicates(items, rows)


def parse_protocol(text: str, fmt: str) -> list[dict]:
    """Parse protocol text in `fmt` ("csv" or "json")."""
    if fmt == "csv":
        return parse_protocol_csv(text)
    if fmt == "json":
        return parse_protocol_json(text)
    raise ProtocolFormatError(f"unknown protocol format {fmt!r}; use csv or json")


def landmark_items(landmarks: Iterable[Landmark]) -> list[dict]:
    """Landmark rows as the plain items the parsers return, in protocol order."""
    return [
        {
            "code": lm.code,
            "name": lm.name,
            "description": lm.description,
            "may_be_absent": lm.may_be_absent,
            "order": lm.order,
        }
        for lm in sorted(landmarks, key=lambda lm: (lm.order, lm.code))
    ]


def protocol_to_csv(items: Sequence[dict]) -> str:
    """CSV text with the header COLUMNS; may_be_absent is written yes/no."""
    out = io.StringIO(newline="")
    writer = csv.writer(out, lineterminator="\r\n")
    writer.writerow(COLUMNS)
    for item in items:
        writer.writerow(
            [
                item["code"],
                item["name"],
                item.get("description", ""),
                "yes" if item.get("may_be_absent") else "no",
                item.get("order", 0),
            ]
        )
    return out.getvalue()


def protocol_to_json(items: Sequence[dict], **header: object) -> str:
    """JSON text: {...header, "landmarks": [...]} (header, e.g. study and version, is optional)."""
    body = {**header, "landmarks": [{column: item[column] for column in COLUMNS} for item in items]}
    return json.dumps(body, indent=2, ensure_ascii=False) + "\n"
