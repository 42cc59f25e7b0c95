"""Plain-text tables: one renderer for every table bandloom prints (commands, run summary, block reports)."""

from __future__ import annotations

from collections.abc import Sequence

__all__ = ["engineering", "format_value", "render_pairs", "render_rows"]

_PREFIXES = ((1e12, "T"), (1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"), (1e-6, "µ"), (1e-9, "n"))


def engineering(value: float, unit: str = "") -> str:
    """A number with an SI prefix and about four significant digits, for people: 635.5 ksps, 2.4 MHz, 12 µs.

    >>> engineering(635_500.0, "sps"), engineering(2.4e6, "Hz"), engineering(1.2e-5, "s"), engineering(-0.0)
    ('635.5 ksps', '2.4 MHz', '12 µs', '0')
    """
    if value == 0 or value != value or value in (float("inf"), float("-inf")):
        text = "0" if value == 0 else ("-" if value != value else ("inf" if value > 0 else "-inf"))
        return f"{text} {unit}" if unit else text
    scale, prefix = next(((s, p) for s, p in _PREFIXES if abs(value) >= s), _PREFIXES[-1])
    number = f"{value / scale:.4g}"
    return f"{number} {prefix}{unit}".rstrip()


def format_value(value: object) -> str:
    """A cell: yes/no for booleans, "-" for None and NaN, floats to about four significant digits (with an
    SI prefix when very large or very small, never as 6.355e+05), and never "-0"."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        if value != value:
            return "-"
        if value in (float("inf"), float("-inf")):
            return "inf" if value > 0 else "-inf"
        if value == 0:
            return "0"                                      # never "-0"
        if abs(value) >= 1e5 or (0 < abs(value) < 1e-3):
            return engineering(value)
        text = f"{value:.4f}".rstrip("0").rstrip(".") if abs(value) < 10 else f"{value:.2f}"
        return "0" if text in ("-0", "0", "-0.00", "0.00") else text
    if value is None:
        return "-"
    return str(value)


def _is_number(value: object) -> bool:
    """A number, or a number already formatted by the caller ("+0.003", "-127.80", "53.3%")."""
    if isinstance(value, bool):
        return False
    if isinstance(value, (int, float)):
        return True
    if isinstance(value, str) and value:
        try:
            float(value.rstrip("%"))
            return True
        except ValueError:
            return False
    return False


def render_rows(headers: Sequence[object], rows: Sequence[Sequence[object]]) -> str:
    """Columns left-aligned for text, right-aligned for numbers; two spaces apart.

    A caller that wants a fixed number of decimals passes the value formatted as text; a column whose
    every cell is a number (or such text) is right-aligned.

    >>> print(render_rows(["link", "samples", "gain dB"], [["a -> b", 1200, "+0.000"], ["c -> d", 7, "-0.125"]]))
    link    samples  gain dB
    ------  -------  -------
    a -> b     1200   +0.000
    c -> d        7   -0.125
    """
    cells = [[format_value(v) for v in row] for row in rows]
    widths = [max(len(str(h)), *(len(r[i]) for r in cells)) if cells else len(str(h))
              for i, h in enumerate(headers)]
    numeric = [bool(rows) and all(_is_number(row[i]) for row in rows) for i in range(len(headers))]

    def line(values: Sequence[str]) -> str:
        return "  ".join(v.rjust(w) if n else v.ljust(w)
                         for v, w, n in zip(values, widths, numeric)).rstrip()

    out = [line([str(h) for h in headers]), line(["-" * w for w in widths])]
    out.extend(line(r) for r in cells)
    return "\n".join(out)


def render_pairs(pairs: Sequence[tuple[str, object, str]]) -> str:
    """``label  value  unit`` lines, labels padded to one width."""
    width = max(len(label) for label, _, _ in pairs)

    def shown(value: object, unit: str) -> str:
        if isinstance(value, float) and not isinstance(value, bool) and (abs(value) >= 1e5 or 0 < abs(value) < 1e-3):
            return engineering(value, unit)                 # the prefix joins the unit: 2.4 MHz
        return f"{format_value(value)}{(' ' + unit) if unit else ''}"

    return "\n".join(f"{label.ljust(width)}  {shown(value, unit)}" for label, value, unit in pairs)
