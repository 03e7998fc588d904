"""Range checks for numeric settings, with refusals that quote the bad value sanely (no 40-digit numbers).

Every engine and service setting has a documented range (docs/parameters.md); the checks here
turn a value outside it into one InvalidInput line: what was given, the range and unit, what to
do. Torch-free and import-light, so the server process, the fit settings and the tasks share it.
"""

from __future__ import annotations

import math

from .errors import InvalidInput


def shown(value) -> str:
    """A value as it belongs in a one-line message: huge or tiny numbers in short scientific form,
    long text cut, other types named."""
    if isinstance(value, bool):
        return str(value).lower()
    if isinstance(value, int):
        if abs(value) < 10_000:
            return str(value)
        return f"{value:,}" if abs(value) < 10**9 else f"{float(value):.3g}"
    if isinstance(value, float):
        if not math.isfinite(value):
            return str(value)
        if value.is_integer() and abs(value) < 10**9:
            return shown(int(value))
        return f"{value:.4g}"
    if isinstance(value, str):
        return repr(value) if len(value) <= 40 else repr(value[:37] + "...")
    return f"a {type(value).__name__}"


def shown_bytes(count: float) -> str:
    """A byte count in the unit a person reads (KiB..TiB), three significant figures."""
    count = float(count)
    for unit, size in (("TiB", 2**40), ("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if abs(count) >= size:
            return f"{count / size:.3g} {unit}" if count / size < 1e4 else f"more than 10000 {unit}"
    return f"{count:.0f} bytes"


def _range(lo, hi, unit: str) -> str:
    tail = f" {unit}" if unit else ""
    return f"{shown(lo)} to {shown(hi)}{tail}"


def whole_number(name: str, value, lo: int, hi: int, unit: str = "", why: str = "") -> int:
    """``value`` if it is an int (not a bool) in lo..hi, else InvalidInput naming name and the range."""
    if isinstance(value, bool) or not isinstance(value, int):
        raise InvalidInput(f"{name} must be a whole number from {_range(lo, hi, unit)}, got {shown(value)}"
                           + (f": {why}" if why else ""))
    if not lo <= value <= hi:
        raise InvalidInput(f"{name} {shown(value)} is out of range: use {_range(lo, hi, unit)}"
                           + (f" ({why})" if why else ""))
    return value


def number(name: str, value, lo: float, hi: float, unit: str = "", why: str = "", open_low: bool = False) -> float:
    """``value`` as a float if it is a finite int/float in [lo, hi] ((lo, hi] with open_low), else InvalidInput."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InvalidInput(f"{name} must be a number from {_range(lo, hi, unit)}, got {shown(value)}"
                           + (f": {why}" if why else ""))
    low_ok = value > lo if open_low else value >= lo
    if not (low_ok and value <= hi):
        words = f"above {shown(lo)} and at most {shown(hi)}{' ' + unit if unit else ''}" if open_low else \
            _range(lo, hi, unit)
        raise InvalidInput(f"{name} {shown(value)} is out of range: use {words}" + (f" ({why})" if why else ""))
    return float(value)
