"""CSV tables: a header and one row per entry; numbers as the shortest text that reads back
as the same float32 or float64, empty where a value does not exist.
"""

from __future__ import annotations

import csv
import io
import json
import os
import re
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from sillmark.errors import InvalidParameter
from sillmark.io.atomic import atomic_output
from sillmark.io.json_values import json_value
from sillmark.products.inventory import table_columns

if TYPE_CHECKING:  # pragma: no cover
    from sillmark.engine.flood import SpillResult
    from sillmark.grid.dem import DEM


def cell_text(value: Any) -> str:
    """One value of a mixed (object) column as its CSV text.

    None is empty; booleans ``true``/``false``; floats their shortest round-trip
    decimal without an exponent; lists and dicts their JSON; text made safe
    for spreadsheets (:func:`spreadsheet_safe`).

    Examples
    --------
    >>> [cell_text(v) for v in (None, True, 0.1, 47.0, 3, [1, 2], "=1+1")]
    ['', 'true', '0.1', '47', '3', '[1, 2]', "'=1+1"]
    """
    if value is None:
        return ""
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (float, np.floating)):
        return np.format_float_positional(value, unique=True, trim="-") if np.isfinite(value) else ""
    if isinstance(value, (int, np.integer)):
        return str(value)
    if isinstance(value, (dict, list)):
        return spreadsheet_safe(json.dumps(value, ensure_ascii=False))
    return spreadsheet_safe(str(value))


def float_texts(values: np.ndarray) -> list[str]:
    """The shortest round-trip text of every value of a float32 or float64 array, fast.

    The per-value route (``format_float_positional`` on each number) costs about
    a microsecond a number, and tables of hundreds of thousands of depressions
    have millions. ``astype(str)`` prints the same shortest round-trip digits
    (numpy's Dragon4 in unique mode; Steele & White 1990) in one C loop, in
    positional or exponent form; here each text is only rewritten without an
    exponent and trimmed (``47.0`` -> ``47``), and inf and NaN become empty.
    """
    is32 = values.dtype == np.float32
    flat = np.asarray(values, dtype=np.float32 if is32 else np.float64).reshape(-1)
    # float64: Python's repr is the same shortest round-trip text (David Gay's
    # correctly rounded dtoa, same exponent thresholds), about 1.5x faster.
    texts = flat.astype(str).tolist() if is32 else list(map(repr, flat.tolist()))
    out = []
    append = out.append
    for t in texts:
        if "e" in t:
            append(_positional(t))
        elif t[-2:] == ".0":
            append(t[:-2])
        elif t[-1] in "fn":  # inf, -inf, nan
            append("")
        else:
            append(t)
    return out


def _positional(scientific: str) -> str:
    """'-4.76e+01' -> '-47.6': a text in exponent form written out without it, trimmed."""
    mant, exp = scientific.split("e")
    sign = "-" if mant.startswith("-") else ""
    digits = mant.lstrip("-").replace(".", "")
    point = int(exp) + 1  # digits before the decimal point
    if point <= 0:
        text = "0." + "0" * (-point) + digits
    elif point >= len(digits):
        text = digits + "0" * (point - len(digits))
    else:
        text = digits[:point] + "." + digits[point:]
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return sign + text


#: First characters that make a spreadsheet read a cell as a formula (OWASP, "CSV Injection").
FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def spreadsheet_safe(text: str) -> str:
    """``text`` as a CSV text cell that no spreadsheet runs as a formula.

    A cell beginning with ``=``, ``+``, ``-``, ``@``, a tab or a carriage
    return gets a single quote in front, as OWASP's CSV-injection guidance
    advises; a reader sees the text with a leading quote, and a program gets
    the original back by removing it. Only text cells are passed through
    here: numbers (negative ones too) stay numbers.

    Examples
    --------
    >>> print(spreadsheet_safe("=SUM(A1:A3)"), spreadsheet_safe("-2+3"), spreadsheet_safe("Mill school"))
    '=SUM(A1:A3) '-2+3 Mill school
    """
    return "'" + text if text.startswith(FORMULA_STARTS) else text


def column_texts(values: np.ndarray) -> list[str]:
    """Every entry of a table column as its CSV text (see :func:`write_table_csv`)."""
    values = np.asarray(values)
    kind = values.dtype.kind
    if kind == "O":
        items = values.tolist()
        if set(map(type, items)) <= {str}:
            return _text_cells(items)
        return [cell_text(v) for v in items]
    if kind in "US":
        return _text_cells([str(v) for v in values.tolist()] if kind == "S" else values.tolist())
    if kind in "iu":
        return list(map(str, values.tolist()))
    if kind == "b":
        return [str(int(v)) for v in values.tolist()]
    return float_texts(values)


def _text_cells(items: list[str]) -> list[str]:
    """Text cells made safe for spreadsheets, each distinct text once (columns such as
    a kind of row repeat a few words)."""
    memo: dict[str, str] = {}
    get = memo.get
    out = []
    append = out.append
    for v in items:
        t = get(v)
        if t is None:
            t = memo[v] = spreadsheet_safe(v)
        append(t)
    return out


def json_records(columns: dict[str, np.ndarray]) -> Iterator[dict[str, Any]]:
    n = len(next(iter(columns.values())))
    for k in range(n):
        yield {name: json_value(values, k) for name, values in columns.items()}


def write_depressions_csv(result: "SpillResult", dem: "DEM", path: str | os.PathLike) -> Path:
    """Write ``depressions.csv``: a header on the first line, then one row per depression.

    Empty fields are values that do not exist (a spill point with no
    coordinates). What the columns mean, the units and the caution are in the
    folder's ``README.txt`` (:mod:`sillmark.io.readme`).
    """
    return write_depression_table_csv(result.depressions, dem, path)


def write_depression_table_csv(table, dem: "DEM", path: str | os.PathLike, *,
                               rows: np.ndarray | None = None,
                               extra: dict[str, np.ndarray] | None = None) -> Path:
    """:func:`write_depressions_csv` from a :class:`~sillmark.engine.flood.DepressionTable` itself.

    ``rows`` (boolean per depression, or None for all) picks the depressions
    listed; ``extra`` adds columns (one value per depression of the table, picked
    by ``rows`` too) after the table's own.
    """
    columns = table_columns(table, dem)
    if extra:
        columns.update(extra)
    if rows is not None:
        rows = np.asarray(rows)
        if rows.dtype != bool or rows.shape != (len(table),):
            raise InvalidParameter(
                f"rows must be one boolean per depression ({len(table)}), not {rows.dtype} {rows.shape}")
        columns = {name: np.asarray(values)[rows] for name, values in columns.items()}
    return write_table_csv(path, columns)


def write_table_csv(path: str | os.PathLike, columns: dict[str, np.ndarray]) -> Path:
    """Write a CSV table atomically: the header on the first line, one row per entry.

    Nothing comes before the header, so ``pandas.read_csv(path)`` or a
    spreadsheet opens the file with their default settings; what the columns
    mean and the screening caution go into the results folder's ``README.txt``
    (:mod:`sillmark.io.readme`). ``columns`` maps each header to a numpy array
    (all of one length); numbers are written as the shortest text that reads
    back as the same float32 or float64 (empty for NaN), text made safe for
    spreadsheets, mixed columns (dtype object) cell by cell
    (:func:`cell_text`). The header too is made safe for spreadsheets: it may
    hold names a user chose.
    """
    final = Path(path)
    arrays = {name: np.asarray(values) for name, values in columns.items()}
    lengths = {len(a) for a in arrays.values()}
    if len(lengths) > 1:
        raise InvalidParameter(f"the columns of {final.name} differ in length: {sorted(lengths)}")
    with atomic_output(final) as tmp:
        with open(tmp, "x", newline="", encoding="utf-8") as f:
            writer = csv.writer(f, lineterminator="\n")
            writer.writerow(spreadsheet_safe(str(name)) for name in arrays)
            write_rows(f, arrays)
    return final


#: Rows formatted at once by :func:`write_rows`: the texts of a chunk take about
#: 60 bytes per cell of the table, so a chunk stays within tens of megabytes.
ROWS_AT_ONCE = 1 << 15


def write_rows(f, columns: dict[str, np.ndarray], *, chunk: int = ROWS_AT_ONCE) -> int:
    """Write the rows of a table CSV to the open text file ``f``, ``chunk`` rows at a
    time (:func:`rows_text` of each run of rows: the same text as all at once, and
    the memory of one chunk's texts); returns the number of rows."""
    arrays = {name: np.asarray(values) for name, values in columns.items()}
    lengths = {len(a) for a in arrays.values()}
    if len(lengths) > 1:
        raise InvalidParameter(f"the columns differ in length: {sorted(lengths)}")
    n = lengths.pop() if lengths else 0
    for a in range(0, n, chunk):
        f.write(rows_text({name: v[a:a + chunk] for name, v in arrays.items()}))
    return n


#: Characters that make csv.writer quote a field (delimiter, quote, line ends).
_NEEDS_QUOTES = re.compile(r'[,"\r\n]')


def rows_text(columns: dict[str, np.ndarray]) -> str:
    """The rows of a table CSV as :func:`write_table_csv` writes them, as one text.

    Numbers as the shortest text that reads back as the same float32 or
    float64 (empty for NaN), text made safe for spreadsheets; the text is what
    ``csv.writer`` writes, built by joining the columns' texts when no field
    needs quoting (several times faster). Empty when the columns are.
    """
    arrays = [np.asarray(values) for values in columns.values()]
    lengths = {len(a) for a in arrays}
    if len(lengths) > 1:
        raise InvalidParameter(f"the columns differ in length: {sorted(lengths)}")
    if not arrays or not lengths.pop():
        return ""
    texts = [column_texts(a) for a in arrays]
    plain = len(texts) > 1 and not any(
        any(_NEEDS_QUOTES.search(t) for t in set(column))
        for column, a in zip(texts, arrays) if a.dtype.kind in "USO")
    if plain:
        return "\n".join(map(",".join, zip(*texts))) + "\n"
    buffer = io.StringIO(newline="")
    csv.writer(buffer, lineterminator="\n").writerows(zip(*texts))
    return buffer.getvalue()
