"""Reading a return history sent as text/csv: a header of `date, CODE, CODE, ...`, then one row per
period with simple returns as decimals. Empty cells and NA/NaN/null are missing values, which the
estimation refuses with the row named; nothing is dropped here."""

from __future__ import annotations

import csv
import io
import math

from .errors import Unprocessable, field_error

MISSING = frozenset({"", "na", "n/a", "nan", "null", "none"})


def _refuse(field: str, reason: str) -> Unprocessable:
    return Unprocessable(f"{field}: {reason}", errors=[field_error(field, reason)])


def read_history_csv(raw: bytes) -> tuple[list[str], dict[str, list[float | None]], list[str]]:
    """(dates, one series per code, the CSV line of each row)."""
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as error:
        raise _refuse("body", f"the CSV is not UTF-8 text (byte {error.start})") from None
    rows = list(csv.reader(io.StringIO(text)))
    while rows and not any(cell.strip() for cell in rows[-1]):
        rows.pop()
    if not rows:
        raise _refuse("body", "the CSV is empty; the first line names the date column and the asset codes")
    header = [cell.strip() for cell in rows[0]]
    codes = header[1:]
    if not codes:
        raise _refuse("body", "the header needs a date column and at least one asset code")
    for j, code in enumerate(codes):
        if code in codes[:j]:
            raise _refuse("body", f"asset code {code!r} is in the header twice")
    dates: list[str] = []
    lines: list[str] = []
    series: dict[str, list[float | None]] = {code: [] for code in codes}
    for number, row in enumerate(rows[1:], start=2):
        if len(row) != len(header):
            raise _refuse("body", f"CSV line {number} has {len(row)} cells; the header has {len(header)}")
        dates.append(row[0].strip())
        lines.append(f"CSV line {number}")
        for code, cell in zip(codes, row[1:], strict=True):
            value = cell.strip()
            if value.lower() in MISSING:
                series[code].append(None)
                continue
            try:
                number_value = float(value)
            except ValueError:
                raise _refuse(f"returns.{code}", f"CSV line {number}: {value[:40]!r} is not a number") from None
            if not math.isfinite(number_value):
                raise _refuse(f"returns.{code}", f"CSV line {number}: {value[:40]!r} is not a finite number")
            series[code].append(number_value)
    return dates, series, lines
