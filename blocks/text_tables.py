"""Plain-text tables: one renderer for every table bandloom prints (commands, run summary, block reports)."""

from __future__ import annotations

from collections.abc import Sequence

__all__ = ["format_value", "render_pairs", "render_rows"]


def format_value(value: object) -> str:
    """A cell: yes/no for booleans, "-" for None and NaN, floats to about four significant digits."""
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
            return f"{value:.4g}"
        return f"{value:.4f}".rstrip("0").rstrip(".") if abs(value) < 10 else f"{value:.2f}"
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
    return "\n".join(f"{label.ljust(width)}  {format_value(value)}{(' ' + unit) if unit else ''}"
                     for label, value, unit in pairs)
