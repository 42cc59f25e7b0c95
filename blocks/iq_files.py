"""Raw IQ files with SigMF metadata: the reader (a source) and the writer (a sink).

Sample formats and their scales are those of :mod:`.sample_formats`
(cf32, cf64, ci16, ci8, cu8; little-endian unless ``byte_order = "big"``).
"""

from __future__ import annotations

import json
import math
import re
import stat
from pathlib import Path
from typing import IO, Any

import numpy as np

from .block import Block, BlockContext, BlockError, Chunk, Loss, Output, Pacer, Param, Port, StreamInfo
from .output_files import replace_file, whole_records
from .params import UNIT_BOUNDS, shortened, toml_repr
from .sample_formats import COMPLEX_FORMATS, FORMATS, ByteOrder

__all__ = ["IQReader", "IQWriter", "read_sigmf", "sigmf_meta_path", "write_sigmf"]

SIGMF_VERSION = "1.2.0"


def sigmf_meta_path(data_path: str | Path) -> Path:
    """Where the SigMF metadata of ``data_path`` lives: same name, suffix .sigmf-meta."""
    data_path = Path(data_path)
    return data_path.with_suffix(".sigmf-meta")


#: The largest metadata file read (SigMF metadata is small; annotations of a long recording stay far below).
MAX_META_BYTES = 64 << 20


def read_sigmf(meta_path: Path) -> tuple[str, str, Any, Any, Any]:
    """(format, byte_order, sample_rate, frequency, datetime) from a SigMF metadata file.

    Field names from the SigMF specification (global core:datatype,
    core:sample_rate; captures core:frequency, core:datetime); the tests
    check what bandloom writes against the sigmf package's published schema.
    The file is validated like a flow file: every refusal names the file and
    the field and says what would be right (its size is bounded, JSON nesting
    too deep is refused, numbers must be finite and in range).
    """
    def refuse(field: str, what: str, value: object) -> BlockError:
        return BlockError(f"{meta_path}: {field}: expected {what}, got {_json_text(value)}", param="metadata")

    try:
        with open(meta_path, "rb") as handle:
            raw = handle.read(MAX_META_BYTES + 1)
    except OSError as error:
        raise BlockError(f"cannot read {meta_path}: {error.strerror}", param="metadata") from None
    if len(raw) > MAX_META_BYTES:
        raise BlockError(f"{meta_path} is larger than {MAX_META_BYTES >> 20} MiB; not SigMF metadata",
                         param="metadata")
    try:
        meta = json.loads(raw.decode("utf-8"))
    except (ValueError, RecursionError) as error:
        reason = "nested too deeply" if isinstance(error, RecursionError) else str(error)
        raise BlockError(f"cannot use {meta_path} as SigMF metadata: not JSON ({reason})", param="metadata") from None
    if not isinstance(meta, dict):
        raise refuse("(top level)", "a JSON object with \"global\" and \"captures\"", meta)
    core = meta.get("global")
    if not isinstance(core, dict):
        raise refuse("global", "an object", core)
    datatype = core.get("core:datatype")
    if not isinstance(datatype, str):
        raise refuse("global.core:datatype", "text such as \"cf32_le\"", datatype)
    m = re.fullmatch(r"c(f32|f64|i16|i8|u8)(_le|_be)?", datatype)
    if not m:
        raise BlockError(f"{meta_path}: core:datatype {shortened(datatype)!r} is not a complex format this reader "
                         f"takes (cf32, cf64, ci16, ci8, cu8; _le or _be)", param="metadata")
    rate = core.get("core:sample_rate")
    if rate is not None and not _number_in(rate, 1e-9, UNIT_BOUNDS["Hz"][1]):
        raise refuse("global.core:sample_rate", "a sample rate in Hz, a finite number above 0", rate)
    captures = meta.get("captures", [])
    if not isinstance(captures, list) or not all(isinstance(c, dict) for c in captures):
        raise refuse("captures", "a list of objects", captures)
    capture = captures[0] if captures else {}
    frequency = capture.get("core:frequency")
    if frequency is not None and not _number_in(frequency, *UNIT_BOUNDS["Hz"]):
        raise refuse("captures[0].core:frequency", "a frequency in Hz, a finite number", frequency)
    when = capture.get("core:datetime")
    if when is not None and not (isinstance(when, str) and len(when) <= 64 and when.isprintable()):
        raise refuse("captures[0].core:datetime", "an ISO 8601 time such as \"2026-12-03T07:00:00Z\"", when)
    return ("c" + m.group(1), "big" if m.group(2) == "_be" else "little", rate, frequency, when)


def _number_in(value: object, low: float, high: float) -> bool:
    """A JSON number within [low, high]: a finite float, or an int of any size (compared exactly, never
    made a float, which would overflow for a huge one)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return False
    return (isinstance(value, int) or math.isfinite(value)) and low <= value <= high


def _json_text(value: object) -> str:
    """A JSON value as a message shows it: containers summarised, text shortened, absence said."""
    if isinstance(value, (list, dict)):
        return f"a JSON {'array' if isinstance(value, list) else 'object'} of {len(value)} items"
    return "nothing" if value is None else toml_repr(value)


def write_sigmf(data_path: Path, *, datatype: str, sample_rate: float, frequency: float, start_time: str | None,
                description: str, gaps: list[tuple[int, int]] | tuple = ()) -> Path:
    meta = {
        "global": {"core:datatype": datatype, "core:sample_rate": float(sample_rate),
                   "core:version": SIGMF_VERSION, "core:num_channels": 1,
                   "core:recorder": "bandloom", "core:description": description},
        "captures": [dict({"core:sample_start": 0, "core:frequency": float(frequency)},
                          **({"core:datetime": start_time} if start_time else {}))],
        "annotations": [{"core:sample_start": int(start), "core:sample_count": int(count),
                         "core:comment": "zero-filled: these samples were lost upstream"} for start, count in gaps],
    }
    return replace_file(sigmf_meta_path(data_path), json.dumps(meta, indent=2) + "\n")


class IQReader(Block):
    type_name = "iq-reader"
    summary = "Read raw interleaved IQ samples from a file (cf32, cf64, ci16, ci8, cu8)."
    is_source = True
    length_parameter = "repeat"
    parameters = (
        Param("path", "input-path", "the file, relative to the flow file's folder"),
        Param("metadata", "choice", "'sigmf' reads format, rate, centre frequency and start time from the "
              "SigMF file beside the data (NAME.sigmf-meta); 'auto' does so when one is there", default="auto",
              choices=("auto", "sigmf", "none")),
        Param("format", "choice", "sample format (default cf32, or the metadata's)", default=None,
              choices=COMPLEX_FORMATS),
        Param("byte_order", "choice", "byte order of multi-byte formats (default little, or the metadata's)",
              default=None, choices=("little", "big")),
        Param("sample_rate", "quantity", "sample rate of the recording (default: the metadata's)", default=None,
              unit="Hz", minimum=1e-9),
        Param("centre_frequency", "quantity", "RF frequency at 0 Hz of the recording (default: the "
              "metadata's, else 0)", default=None, unit="Hz"),
        Param("start", "quantity", "skip this much of the recording first", default=0.0, unit="s", minimum=0),
        Param("duration", "quantity", "read at most this much (0 = to the end)", default=0.0, unit="s", minimum=0),
        Param("repeat", "int", "play the selection this many times in all (looping)", default=1, minimum=1, maximum=1_000_000),
        Param("chunk_size", "int", "samples per message", default=65536, minimum=1, maximum=1 << 24),
        Param("pace", "bool", "deliver at the sample rate, as a live receiver would", default=False),
        Param("trailing_bytes", "choice", "what to do with a partial sample at the end of the file: "
              "'error' refuses the file, 'drop' ignores the tail with a warning", default="error",
              choices=("error", "drop")),
    )
    outputs = (Port("samples", "samples", "IQ samples, full scale 1.0"),)

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        self.file: IO[bytes] | None = None
        self.index = 0               # absolute index of the next sample sent
        self.count = 0
        self.truncated = ""          # why the file ended early, once it has
        self.pacer: Pacer | None = None

    def _settings(self) -> tuple[str, str, float, float, str | None]:
        """Format, byte order, rate, centre and start time: the flow's values, else the metadata's."""
        path = self.context.input_path(self.params["path"])
        meta_path = sigmf_meta_path(path)
        meta: tuple[Any, ...] = (None, None, None, None, None)
        if self.params["metadata"] == "sigmf" or (self.params["metadata"] == "auto" and meta_path.exists()):
            if not meta_path.exists():
                raise BlockError(f"metadata = \"sigmf\" but there is no {meta_path}", param="metadata")
            meta = read_sigmf(meta_path)
        fmt = self.params.get("format") or meta[0] or "cf32"
        order = self.params.get("byte_order") or meta[1] or "little"
        rate = self.params.get("sample_rate") or meta[2]
        if not rate:
            raise BlockError("missing sample_rate: give it here or in a SigMF metadata file beside the data "
                             f"({meta_path.name})", param="sample_rate")
        centre = self.params.get("centre_frequency")
        centre = centre if centre is not None else (meta[3] or 0.0)
        return fmt, order, float(rate), float(centre), meta[4]

    def _geometry(self) -> tuple[Path, int, int, int, int]:
        path = self.context.input_path(self.params["path"])
        fmt, order, rate, centre, when = self._settings()
        try:
            info = path.stat()
        except OSError as error:
            relative = "" if Path(self.params["path"]).is_absolute() else " (paths are relative to the flow file's folder)"
            raise BlockError(f"cannot read {path}: {error.strerror}{relative}", param="path") from None
        if not stat.S_ISREG(info.st_mode):
            what = "a folder" if stat.S_ISDIR(info.st_mode) else "not a regular file (a device, pipe or socket)"
            raise BlockError(f"{path} is {what}; give the path of a recording", param="path")
        size = info.st_size
        sample_bytes = FORMATS[fmt].bytes_per_sample
        tail = size % sample_bytes
        if tail and self.params["trailing_bytes"] == "error":
            raise BlockError(f"{path} holds {size} bytes, not a whole number of {sample_bytes}-byte {fmt} "
                             f"samples ({tail} bytes left over); check the format, or set "
                             f"trailing_bytes = \"drop\"", param="path")
        total = size // sample_bytes
        first = int(round(self.params["start"] * rate))
        if first > total:
            raise BlockError(f"start = {self.params['start']:g} s is past the end of {path} "
                             f"({total / rate:g} s)", param="start")
        count = total - first
        if self.params["duration"]:
            count = min(count, int(round(self.params["duration"] * rate)))
        return path, sample_bytes, tail, first, count

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        self._geometry()
        fmt, order, rate, centre, when = self._settings()
        return {"samples": StreamInfo("samples", "cf32", rate, centre, start_time=when)}

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        path, self.sample_bytes, tail, self.first, self.count = self._geometry()
        name, self.byte_order, rate, _, _ = self._settings()
        self.format = FORMATS[name]
        if tail:
            self.warn(f"dropping the last {tail} bytes of {path} (a partial sample)")
        self.file = open(path, "rb")
        self.file.seek(self.first * self.sample_bytes)
        self.position = 0            # samples delivered from the selection, this pass
        self.passes_left = self.params["repeat"]
        self.path = path
        self.rate = rate

    def begin(self) -> None:
        self.pacer = Pacer(self.rate) if self.params["pace"] else None

    def produce(self) -> Output | None:
        assert self.file is not None
        if self.truncated:
            raise BlockError(self.truncated)
        if self.stopping:
            return None
        if self.position >= self.count:
            self.passes_left -= 1
            if self.passes_left <= 0 or self.count == 0:
                return None
            self.file.seek(self.first * self.sample_bytes)
            self.position = 0
        n = min(self.params["chunk_size"], self.count - self.position)
        offset = self.file.tell()
        # native cf32 / f32 is read straight into room the output link lends (its shared-memory ring), if any
        byte_order: ByteOrder = "big" if self.byte_order == "big" else "little"
        room = None
        if self.format.is_plain(byte_order) and self.context.output_room is not None:
            sample_type = np.dtype(np.complex64 if self.format.is_complex else np.float32)
            room = self.context.output_room("samples", (n,), sample_type)
        raw: bytes | np.ndarray
        if room is not None:
            raw = room.view(np.uint8)
            raw = raw[:self.file.readinto(raw)]  # type: ignore[attr-defined]  # a BufferedReader: open(..., "rb")
        else:
            raw = self.file.read(n * self.sample_bytes)
        if len(raw) < n * self.sample_bytes:
            # the file is shorter than when the run started: deliver the whole samples, then fail
            end = offset + len(raw)
            partial = len(raw) % self.sample_bytes
            self.truncated = (f"{self.path} ended at byte {end} while {offset + n * self.sample_bytes} were "
                              f"expected (the file shrank while being read)"
                              + (f"; a partial sample of {partial} bytes at byte {end - partial} was not used"
                                 if partial else "")
                              + f"; the {self.index + len(raw) // self.sample_bytes} whole samples before it "
                              f"were delivered")
        n = len(raw) // self.sample_bytes
        if n == 0:
            if self.truncated:
                raise BlockError(self.truncated)
            return None
        data = room[:n] if room is not None else self.format.decode(raw[:n * self.sample_bytes], byte_order)
        chunk = Chunk(data, self.index)
        self.position += n
        self.index += n
        if self.pacer:
            self.pacer.wait_until(self.index)
        return {"samples": [chunk]}

    def progress(self) -> tuple[int, int]:
        return self.index, self.count * self.params["repeat"]

    def close(self) -> None:
        if self.file:
            self.file.close()


class IQWriter(Block):
    type_name = "iq-writer"
    restartable = True                # a new instance continues the file (see _resume)
    summary = "Write one stream of IQ samples to a raw file (cf32, cf64, ci16, ci8 or cu8)."
    parameters = (
        Param("path", "output-path", "the file, relative to the output folder; may use {channel}, "
              "{frequency} (Hz) and {frequency_mhz} placeholders"),
        Param("format", "choice", "sample format written", default="cf32", choices=COMPLEX_FORMATS),
        Param("metadata", "bool", "also write SigMF metadata beside the file (NAME.sigmf-meta): rate, "
              "centre frequency, datatype, start time, and the flow and block that made it", default=True),
    )
    inputs = (Port("samples", "samples", "IQ samples"),)

    def __init__(self, params: dict[str, Any], context: BlockContext) -> None:
        super().__init__(params, context)
        self.file: IO[bytes] | None = None
        self.path: Path | None = None
        self.gaps: list[tuple[int, int]] = []
        self.written = 0              # samples of the input written
        self.zero_filled = 0          # zeros written for samples missing upstream
        self.received = 0             # samples of the input taken
        self.not_written = 0          # samples taken but not in the file after a failed write
        self.failure = ""             # the failed write's reason
        self.base = 0                 # samples already in the file when this instance took it over
        self.resuming = False         # a restarted instance that has not yet had its first chunk
        self.lost_before = 0          # received by the failed instance, not in its file

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        path = self.params["path"]
        if self.params["metadata"] and path.endswith(".sigmf-meta"):
            raise BlockError("path ends in .sigmf-meta, the name the metadata file takes; name the data "
                             "NAME.sigmf-data", param="path")
        return {}

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        self.stream = inputs["samples"]
        self.format = FORMATS[self.params["format"]]
        path = self.context.output_path(self.params["path"])
        if self.context.restart and path.is_file():
            self._resume(path)
        else:
            self.path, self.file = self.open_output(self.params["path"])
        self._write_metadata()          # valid from the start; replaced whole at the end

    def _resume(self, path: Path) -> None:
        """Continue the file a failed instance wrote: keep its whole samples and its gaps; the first
        chunk then fills with zeros from the end of the file to its first index."""
        self.path, self.file = self.open_output(self.params["path"], "ab")
        self.base = whole_records(self.file, self.format.bytes_per_sample)
        self.resuming = True
        self.lost_before = max(0, self.context.resumed_at.get("samples", 0) - self.base)
        try:
            annotations = json.loads(sigmf_meta_path(path).read_text())["annotations"]
            self.gaps = [(int(a["core:sample_start"]), int(a["core:sample_count"])) for a in annotations
                         if int(a["core:sample_start"]) < self.base]
        except (OSError, ValueError, KeyError, TypeError):
            self.warn(f"the gaps noted before the restart are not known (no readable {sigmf_meta_path(path)})")

    def kept_from_predecessor(self, port: str) -> int | None:
        return self.base if self.resuming else None

    def consume(self, port: str, chunk: Chunk) -> Output:
        assert self.file is not None
        self.received += chunk.count
        gap = chunk.dropped
        if self.resuming:                 # from the end of the file the failed instance left
            gap, self.resuming = chunk.first_index - self.base, False
        if gap:
            # A raw file has no way to mark a gap: keep absolute time with zeros
            # (and say so in the metadata's annotations).
            self.gaps.append((self.base + self.written + self.zero_filled, gap))
            self.zero_filled += gap
        if gap != chunk.dropped:
            chunk = Chunk(chunk.data, chunk.first_index, discontinuity=True, dropped=gap)
        try:
            for piece in chunk.filled_pieces():
                self.file.write(np.ascontiguousarray(self.format.encode(piece)).data)
        except OSError as error:
            self.failure = error.strerror or str(error)
            raise
        self.written += chunk.count
        return {}

    def _write_metadata(self) -> None:
        if not (self.params["metadata"] and self.path):
            return
        s = self.stream
        what = f"channel {s.channels[0]} " if s.channels else ""
        datatype = self.format.name + ("_le" if self.format.bytes_per_sample > 2 else "")
        write_sigmf(self.path, datatype=datatype, sample_rate=s.sample_rate,
                    frequency=s.centre_frequency, start_time=s.start_time, gaps=self.gaps,
                    description=f"{what}written by bandloom block '{self.context.name}' of flow "
                                f"{self.context.flow_path}")

    def close(self) -> None:
        if self.file and self.path:
            if self.failure:
                # keep every whole sample written before the failure; count the rest
                in_file = whole_records(self.file, self.format.bytes_per_sample) - self.base
                self.written = max(0, min(self.received, in_file - self.zero_filled))
                self.not_written = self.received - self.written
            self.file.close()
            self.file = None
            self._write_metadata()

    def losses(self) -> list[Loss]:
        losses = [Loss(self.not_written, f"not written to {self.path}: {self.failure}")] if self.not_written else []
        if self.lost_before:
            losses.append(Loss(self.lost_before, f"received by the instance that failed, not in {self.path}"))
        return losses

    def report(self) -> list[str]:
        gaps = f", {self.zero_filled} zero-filled for gaps" if self.zero_filled else ""
        failed = f"; {self.not_written} samples not written ({self.failure})" if self.not_written else ""
        resumed = f" after the {self.base} its failed predecessor wrote" if self.context.restart and self.path else ""
        return [f"wrote {self.written} samples to {self.path or '?'}{resumed}{gaps}{failed}"]
