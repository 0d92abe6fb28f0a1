"""Numbers for people: three significant digits, durations in the unit that reads best.

Why: a table cell of "1.107e-09" or "7342.118" makes the reader do the work. Three
significant digits carry everything a decision needs, and a duration reads at a
glance as 12.3 ms, 4.5 s or 2.1 h. Exponents appear only beyond a million or below
a thousandth, where no plain form is short.
"""

import math

SUPERSCRIPT = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")
DURATIONS = (("ns", 1e-9), ("µs", 1e-6), ("ms", 1e-3), ("s", 1.0), ("min", 60.0), ("h", 3600.0), ("days", 86400.0))


def number(value: float, digits: int = 3) -> str:
    """`value` to `digits` significant digits, in plain notation when it fits."""
    if value is None:
        return "–"
    value = float(value)
    if not math.isfinite(value):
        return "∞" if value == math.inf else "−∞" if value == -math.inf else "NaN"
    if value == 0:
        return "0"
    if value.is_integer() and abs(value) < 1e6:
        return f"{int(value):d}"
    if 1e-3 <= abs(value) < 1e6:
        places = max(0, digits - 1 - math.floor(math.log10(abs(value))))
        return f"{value:.{places}f}".rstrip("0").rstrip(".") if places else f"{round(value):d}"
    mantissa, exponent = f"{value:.{digits - 1}e}".split("e")
    return f"{mantissa.rstrip('0').rstrip('.')}×10{str(int(exponent)).translate(SUPERSCRIPT)}"


def duration(seconds: float | None) -> str:
    """A span of time in its most readable unit: '850 µs', '12.3 ms', '4.5 s', '2.1 h'."""
    if seconds is None or not math.isfinite(float(seconds)):
        return "–" if seconds is None else number(seconds)
    seconds = float(seconds)
    if seconds == 0:
        return "0 s"
    unit, scale = DURATIONS[0]
    for name, size in DURATIONS:
        if abs(seconds) >= size:
            unit, scale = name, size
    return f"{number(seconds / scale)} {unit}"


def duration_unit(values) -> tuple[str, float]:
    """One unit (name, seconds in it) that suits most of `values`, for a plot axis."""
    finite = sorted(abs(float(v)) for v in values if v is not None and math.isfinite(float(v)) and v != 0)
    if not finite:
        return "s", 1.0
    typical = finite[len(finite) // 2]
    unit = DURATIONS[0]
    for item in DURATIONS:
        if typical >= item[1]:
            unit = item
    return unit


def count(value: float | None) -> str:
    """Bytes, samples and other counts: 1.2 k, 3.4 M; whole numbers below ten thousand as they are."""
    if value is None:
        return "–"
    value = float(value)
    if not math.isfinite(value) or abs(value) < 1e4:
        return number(value)
    for suffix, size in (("G", 1e9), ("M", 1e6), ("k", 1e3)):
        if abs(value) >= size:
            return f"{number(value / size)} {suffix}"
    return number(value)
