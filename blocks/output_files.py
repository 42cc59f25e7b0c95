"""Files blocks write: every failure names the file and the OS reason, and small files are replaced whole.

* :class:`OutputFile` is an unbuffered file whose ``write`` writes everything
  it is given or raises ``OSError`` with the file's name (disk full, a size
  limit, an I/O error): ``"/out/a.sigmf-data: File too large"``, never a bare
  count of bytes. What it wrote before the failure stays in the file.
* :func:`open_output_file` gives one, or a buffered text file on top of one.
* :func:`replace_file` writes a small file (metadata, a report) beside its
  final name and renames it into place, so a reader sees the old file or the
  new one, never half of one, and a failure leaves the old one.
"""

from __future__ import annotations

import io
import os
from pathlib import Path
from typing import IO, Any

__all__ = ["OutputFile", "open_output_file", "replace_file", "whole_records"]


class OutputFile(io.FileIO):
    """An unbuffered file written whole or not at all per call; failures name the file (see module doc).
    It is never opened through a symbolic link (``O_NOFOLLOW``): a link someone else put where an output
    goes is refused, naming it, rather than followed to a file they chose."""

    def __init__(self, path: str | Path, mode: str = "w") -> None:
        try:
            super().__init__(path, mode, opener=lambda name, flags: os.open(name, flags | os.O_NOFOLLOW, 0o666))
        except OSError as error:
            if os.path.islink(path):
                raise OSError(error.errno, "is a symbolic link; bandloom does not write through links it did not "
                              "make (remove it, or choose another path)", str(path)) from None
            raise

    def write(self, data: Any) -> int:
        view = memoryview(data).cast("B")
        total = len(view)
        try:
            while len(view):
                done = super().write(view)
                if done is None:           # only for non-blocking files, which these are not
                    raise BlockingIOError(f"{self.name}: write would block")
                view = view[done:]
        except OSError as error:
            if error.filename:
                raise
            raise OSError(error.errno, error.strerror or str(error), str(self.name)) from None
        return total


def open_output_file(path: str | Path, mode: str = "wb", **options: Any) -> IO[Any]:
    """Open ``path`` for writing: binary modes give an :class:`OutputFile`, text modes a text file over one
    (``encoding`` utf-8 unless given, ``newline`` as for :func:`open`)."""
    raw = OutputFile(path, mode.replace("b", "").replace("t", "") or "w")
    if "b" in mode:
        return raw
    return io.TextIOWrapper(io.BufferedWriter(raw), encoding=options.get("encoding", "utf-8"),
                            newline=options.get("newline"))


def replace_file(path: str | Path, text: str) -> Path:
    """Write ``text`` to ``path`` by writing a hidden file beside it and renaming it into place."""
    path = Path(path)
    temporary = path.with_name(f".{path.name}.partial")
    try:
        with open_output_file(temporary, "w") as handle:
            handle.write(text)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temporary, path)
    finally:
        temporary.unlink(missing_ok=True)
    return path


def whole_records(handle: IO[Any], record_bytes: int, *, start: int = 0) -> int:
    """Cut a partly written last record off an open file (after a failed write); return the records kept.
    ``start`` is where the records begin (a header before them)."""
    size = os.fstat(handle.fileno()).st_size
    keep = max(0, size - start) // record_bytes
    if start + keep * record_bytes != size:
        os.ftruncate(handle.fileno(), start + keep * record_bytes)
    return keep
