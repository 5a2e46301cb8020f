"""JSON text as Sillmark writes it: no NaN or infinity ever (RFC 8259 section 6), float32
values as their shortest exact decimal.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from sillmark.errors import InvalidParameter
from sillmark.io.atomic import atomic_output

if TYPE_CHECKING:  # pragma: no cover
    pass


def shortest_float32(value) -> float | None:
    """A float32 as the shortest Python float that reads back as the same float32."""
    v = np.float32(value)
    if not np.isfinite(v):
        return None
    return float(np.format_float_positional(v, unique=True, trim="-"))


def finite_or_none(value) -> float | None:
    v = float(value)
    return v if math.isfinite(v) else None


def json_value(array: np.ndarray, k: int) -> Any:
    """Element ``k`` as a JSON-ready Python value (None for NaN)."""
    kind = array.dtype.kind
    if kind in "iub":
        return int(array[k])
    if array.dtype == np.float32:
        return shortest_float32(array[k])
    return finite_or_none(array[k])


def json_text(value: Any) -> str:
    # allow_nan=False: NaN is not JSON (RFC 8259, section 6); None stands for it.
    return json.dumps(value, ensure_ascii=False, allow_nan=False, separators=(",", ":"))


def write_json(path: Path, payload: dict) -> Path:
    with atomic_output(path) as tmp:
        with open(tmp, "x", encoding="utf-8") as f:
            f.write(json_text(payload))
            f.write("\n")
    return path


def json_number(value) -> float | int | None:
    """A JSON-ready number: float32 as its shortest exact decimal, NaN/inf as None."""
    if isinstance(value, (bool, np.bool_)):
        raise InvalidParameter("a boolean is not a number")
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, np.float32):
        return shortest_float32(value)
    return finite_or_none(value)
