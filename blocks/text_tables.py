"""Plain-text tables: one renderer for every table bandloom prints (commands, run summary, block reports)."""

from __future__ import annotations

from collections.abc import Sequence

__all__ = ["format_value", "render_pairs", "render_rows"]


def format_value(value: object) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        if value != value:
            return "-"
        if value in (float("inf"), float("-inf")):
            return "inf" if value > 0 else "-inf"
        if abs(value) >= 1e5 or (0 < abs(value) < 1e-3):
            return f"{value:.4g}"
        return f"{value:.4f}".rstrip("0").rstrip(".") if abs(value) < 10 else f"{value:.2f}"
    if value is None:
        return "-"
    return str(value)


def render_rows(headers: Sequence[object], rows: Sequence[Sequence[object]]) -> str:
    """Columns left-aligned for text, right-aligned for numbers; two spaces apart."""
    cells = [[format_value(v) for v in row] for row in rows]
    widths = [max(len(str(h)), *(len(r[i]) for r in cells)) if cells else len(str(h))
              for i, h in enumerate(headers)]
    numeric = [all(isinstance(row[i], (int, float)) and not isinstance(row[i], bool) for row in rows)
               for i in range(len(headers))]

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
