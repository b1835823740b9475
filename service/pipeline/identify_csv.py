"""A historian's CSV export (header row of tags, a time column) as an identification request.

Cells that are empty or read ``nan``, ``null``, ``NA`` or ``-`` are missing values.  Time
stamps are numbers in the time unit, or ISO 8601 date-times converted to seconds, minutes or
hours from the first one.  Every problem names the column and row (``/data/TAG/ROW``, rows
from 0 below the header) or the query parameter.
"""

from __future__ import annotations

import csv
import io
import math
import re
from datetime import datetime

from pydantic import ValidationError

from service.errors import FieldProblem, InvalidRequest
from service.pipeline.problems import pointer, validation_problems
from service.schemas.identify import IdentifyRequest
from service.schemas.identify_csv import IdentifyCsvOptions

__all__ = ["MISSING", "identify_request_from_csv"]

#: Cell texts read as a missing value (case-insensitive, after stripping).
MISSING = frozenset({"", "nan", "null", "na", "n/a", "-", "none"})
SECONDS = {"s": 1.0, "min": 60.0, "h": 3600.0}


def _tags(text: str) -> list[str]:
    return [t.strip() for t in text.split(",") if t.strip()]


#: A number as a historian writes one: optional sign, digits with an optional decimal point,
#: optional exponent.  Python's float() also reads '4_0.0' (as 40), 'infinity' and other
#: scripts' digits, which no CSV export means as numbers.
PLAIN_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")
#: A number written with a decimal comma, as some locales' exports do ('14000,5').
DECIMAL_COMMA = re.compile(r"[+-]?\d+,\d+(?:[eE][+-]?\d+)?")


def _number(cell: str) -> float | None:
    """The cell's number, None for a missing value; ValueError saying what is wrong otherwise."""
    text = cell.strip()
    if text.lower() in MISSING:
        return None
    if not PLAIN_NUMBER.fullmatch(text):
        if DECIMAL_COMMA.fullmatch(text):
            raise ValueError(
                f"{cell!r} is not a number: write the decimals after a point (a decimal comma is not read, "
                f"since a comma may separate the cells)"
            )
        raise ValueError(f"{cell!r} is not a number")
    value = float(text)
    if not math.isfinite(value):
        raise ValueError(f"{cell!r} is too large for double precision (at most about 1.8e308)")
    return value


def _float(cell: str) -> float | None:
    text = cell.strip()
    return float(text) if PLAIN_NUMBER.fullmatch(text) else None


def _times(cells: list[str], options: IdentifyCsvOptions, column: str) -> list[float]:
    """The time column as numbers in the time unit; a problem names the cell by its row.

    The column holds numbers when its first cell is one, else ISO 8601 date-times.
    """
    if _float(cells[0]) is not None:
        times = []
        for k, cell in enumerate(cells):
            value = _float(cell)
            if value is None or not math.isfinite(value):
                what = "missing" if not cell.strip() else f"{cell!r}, not a finite number"
                raise InvalidRequest(
                    [
                        FieldProblem(
                            pointer("data", column, k),
                            f"the time stamp of row {k} is {what} (the column holds numbers)",
                        )
                    ]
                )
            times.append(value)
    else:
        stamps = []
        for k, cell in enumerate(cells):
            try:
                stamps.append(datetime.fromisoformat(cell.strip()))
            except ValueError:
                raise InvalidRequest(
                    [
                        FieldProblem(
                            pointer("data", column, k), f"{cell!r} is neither a number nor an ISO 8601 date-time"
                        )
                    ]
                ) from None
        try:
            first = stamps[0]
            scale = SECONDS[options.time_unit]
            times = [(s - first).total_seconds() / scale for s in stamps]
        except TypeError:
            raise InvalidRequest(
                [FieldProblem(pointer("data", column), "time stamps mix dates with and without a time zone")]
            ) from None
    for k in range(1, len(times)):
        if not times[k] > times[k - 1]:
            raise InvalidRequest(
                [
                    FieldProblem(
                        pointer("data", column, k),
                        f"time stamps must increase strictly: row {k} ({cells[k].strip()}) is not after row {k - 1} "
                        f"({cells[k - 1].strip()})",
                    )
                ]
            )
    return times


def identify_request_from_csv(body: bytes, options: IdentifyCsvOptions) -> IdentifyRequest:
    """Build the JSON request of POST /identify from a CSV body and the query's choices.

    Raises
    ------
    InvalidRequest
        The CSV cannot be read, a cell is not a number, or the assembled request is invalid.
    """
    try:
        text = body.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InvalidRequest([FieldProblem("/body", f"the CSV is not UTF-8 text (byte {exc.start})")]) from None
    try:
        sample = text[:4096]
        dialect: type[csv.Dialect] | csv.Dialect = csv.Sniffer().sniff(sample, delimiters=",;\t")
    except csv.Error:
        dialect = csv.excel
    try:
        rows = [row for row in csv.reader(io.StringIO(text), dialect) if any(c.strip() for c in row)]
    except csv.Error as exc:
        raise InvalidRequest([FieldProblem("/body", f"the CSV cannot be read: {exc}")]) from None
    if len(rows) < 2:
        raise InvalidRequest([FieldProblem("/body", "give a header row of tags and at least one row of values")])
    header = [h.strip() for h in rows[0]]
    duplicates = sorted({h for h in header if header.count(h) > 1})
    if duplicates:
        raise InvalidRequest([FieldProblem("/body", f"the header names {duplicates[0]!r} twice")])
    inputs, outputs = _tags(options.inputs), _tags(options.outputs)
    disturbances = _tags(options.disturbances)
    listed = [*inputs, *outputs, *disturbances]
    problems = [
        FieldProblem(pointer(name), f"{tag!r} is not a column of the CSV (its header: {', '.join(header[:12])})")
        for name, tags in (("inputs", inputs), ("outputs", outputs), ("disturbances", disturbances))
        for tag in tags
        if tag not in header
    ]
    time_column = options.time_column
    if time_column is None and header[0] not in listed:
        time_column = header[0]
    if time_column is not None and time_column not in header:
        problems.append(FieldProblem("/time_column", f"{time_column!r} is not a column of the CSV"))
    if problems:
        raise InvalidRequest(problems)
    width = len(header)
    for k, row in enumerate(rows[1:]):
        if len(row) != width:
            raise InvalidRequest(
                [FieldProblem(f"/body/{k + 1}", f"row {k} has {len(row)} cells; the header has {width}")]
            )
    data: dict[str, list[float | None]] = {}
    for tag in listed:
        j = header.index(tag)
        values: list[float | None] = []
        for k, row in enumerate(rows[1:]):
            try:
                values.append(_number(row[j]))
            except ValueError as exc:
                raise InvalidRequest([FieldProblem(pointer("data", tag, k), str(exc))]) from None
        data[tag] = values
    time = None
    if time_column is not None:
        j = header.index(time_column)
        time = _times([row[j] for row in rows[1:]], options, time_column)
    pairs = []
    for i, item in enumerate(_tags(options.pairs)):
        parts = [p.strip() for p in item.split(":")]
        if len(parts) != 3:
            raise InvalidRequest([FieldProblem("/pairs", f"pair {i} ({item!r}) is not output:input:structure")])
        pairs.append({"output": parts[0], "input": parts[1], "structure": parts[2]})
    request = {
        "sample_time": options.sample_time,
        "inputs": inputs,
        "outputs": outputs,
        "disturbances": disturbances,
        "integrating": _tags(options.integrating),
        "pairs": pairs,
        "data": data,
        "time": time,
        "structure": options.structure,
        "order": options.order,
        "block_rows": options.block_rows,
        "detrend": options.detrend,
        "max_dead_time": options.max_dead_time,
        "settling_time": options.settling_time,
        "outlier_limit": options.outlier_limit,
        "validation": None if options.validation_fraction is None else {"fraction": options.validation_fraction},
        "correlation_lags": options.correlation_lags,
    }
    try:
        return IdentifyRequest.model_validate(request)
    except ValidationError as exc:
        raise InvalidRequest(validation_problems(exc.errors())) from None
