"""One progress line on standard error, redrawn in place, only when standard error is a terminal.

Commands that take a while (``bench``, ``roundtrip``) say what they are doing; before they write results
they clear the line (``progress("")``), so a table never starts after a progress message.
"""

from __future__ import annotations

import sys

__all__ = ["progress"]


def progress(message: str) -> None:
    """Show ``message`` as the progress line ("" clears it); nothing at all when stderr is not a terminal."""
    if sys.stderr.isatty():
        sys.stderr.write(f"\r\x1b[K{message}")
        sys.stderr.flush()
