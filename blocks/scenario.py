"""The scenario generator: a seeded, reproducible synthetic band (for demos and tests).

Everything it makes is synthetic and invented; it imitates no real network.

Levels are powers relative to full scale: a transmitter at L dBFS has mean
power 10**(L/10) (a carrier of amplitude 10**(L/20)). ``noise`` is the power
of the white noise over the whole band, so a channel of 1/M of the band
sees about ``noise - 10 log10 M`` dBFS of it.

Transmitters, one inline table each, all with ``kind``, ``frequency`` (RF,
Hz with units), ``level`` (dBFS) and optional ``on`` (a list of
``[start, stop]`` times; default: always on; keying uses 5 ms raised-cosine
ramps so it does not splatter):

* ``cw``: an unmodulated carrier.
* ``am``: ``depth`` (0..1, default 0.8) of a ``tone`` (default 1 kHz) or of
  voice-like audio (``tone = "voice"``).
* ``fm``: narrowband FM, ``deviation`` (default 2.5 kHz) by a ``tone``
  (default 1 kHz) or voice-like audio (``tone = "voice"``).
* ``fsk``: two-tone continuous-phase FSK, ``baud`` (default 1200) and
  ``shift`` (default 1 kHz, tones at +-shift/2), random bits.
* ``noise``: a wideband interferer, band-limited noise ``bandwidth`` wide
  (default 50 kHz).

Voice-like audio is a few harmonics of a gliding 120-250 Hz pitch under a
syllable-rate envelope (about 4 per second), peak-normalised: enough to look
and sound like speech on a waterfall and through a demodulator.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from .block import Block, BlockError, Chunk, Output, Pacer, Param, Port, StreamInfo, toml_repr
from .units import UnitError, format_frequency, parse_quantity

__all__ = ["KINDS", "RAMP_SECONDS", "Scenario", "keying", "parse_transmitters", "voice_like"]

KINDS = ("cw", "am", "fm", "fsk", "noise")
RAMP_SECONDS = 0.005
_FIELDS = {
    "cw": {},
    "am": {"depth": ("float", 0.8), "tone": ("audio", 1000.0)},
    "fm": {"deviation": ("Hz", 2500.0), "tone": ("audio", 1000.0)},
    "fsk": {"baud": ("Hz", 1200.0), "shift": ("Hz", 1000.0)},
    "noise": {"bandwidth": ("Hz", 50e3)},
}


_MEANING = {
    "depth": "modulation depth, 0 to 1", "tone": "modulating tone in Hz, or \"voice\" for voice-like audio",
    "deviation": "peak frequency deviation", "baud": "symbols per second", "shift": "tone spacing (tones at +-shift/2)",
    "bandwidth": "width of the band-limited noise",
}


def transmitter_keys() -> str:
    """The keys of a ``transmitters`` table, per kind, in plain text (made from the tables the parser uses)."""
    lines = ["Each entry of `transmitters` is an inline table:",
             f"- every kind: `kind` (one of {', '.join(KINDS)}), `frequency` (RF, in Hz, inside the band), "
             "`level` (dBFS, -300 to +40), `on` (a list of [start, stop] times in s; default: always on; "
             "5 ms raised-cosine ramps)"]
    for kind in KINDS:
        keys = [f"`{key}` ({_MEANING[key]}; default {default:g}{'' if unit == 'float' else ' Hz'})"
                for key, (unit, default) in _FIELDS[kind].items()]
        lines.append(f"- {kind}: " + ("; ".join(keys) if keys else "no other keys"))
    lines.append("Rates (deviation, baud, shift, tone) are at most half the sample rate, bandwidth at most the "
                 "sample rate, all above 0.")
    return "\n".join(lines)


def parse_transmitters(items: list[Any], sample_rate: float, centre: float) -> list[dict[str, Any]]:
    """Check the ``transmitters`` list; return plain dicts (Hz, seconds, linear amplitude)."""
    out = []
    for i, item in enumerate(items):
        where = f"transmitters[{i}]"
        if not isinstance(item, dict):
            raise BlockError(f"{where}: expected an inline table such as {{ kind = \"cw\", frequency = "
                             f"\"156.3 MHz\", level = \"-60 dBFS\" }}, got {toml_repr(item)}", param="transmitters")
        kind = item.get("kind")
        if kind not in KINDS:
            raise BlockError(f"{where}.kind: expected one of {', '.join(KINDS)}, got {toml_repr(kind)}",
                             param="transmitters")
        allowed = {"kind", "frequency", "level", "on"} | set(_FIELDS[kind])
        for key in item:
            if key not in allowed:
                raise BlockError(f"{where}: a {kind} transmitter has no {key!r}; it takes "
                                 f"{', '.join(sorted(allowed))}", param="transmitters")
        try:
            tx = {"kind": kind, "frequency": parse_quantity(item["frequency"], "Hz"),
                  "level": parse_quantity(item["level"], "dBFS")}
            for key, (unit, default) in _FIELDS[kind].items():
                value = item.get(key, default)
                if unit == "audio":
                    tx[key] = "voice" if value == "voice" else parse_quantity(value, "Hz")
                elif unit == "float":
                    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 <= value <= 1:
                        raise UnitError(f"{key} expects a number from 0 to 1, got {toml_repr(value)}")
                    tx[key] = float(value)
                else:
                    tx[key] = parse_quantity(value, unit)
            intervals = item.get("on", [[0.0, 1e18]])
            if not isinstance(intervals, list) or not all(isinstance(p, list) and len(p) == 2 for p in intervals):
                raise UnitError(f"on expects a list of [start, stop] pairs such as [[\"0.5 s\", \"2 s\"]], "
                                f"got {toml_repr(intervals)}")
            tx["on"] = [(parse_quantity(a, "s"), parse_quantity(b, "s")) for a, b in intervals]
        except KeyError as missing:
            raise BlockError(f"{where}: missing {missing.args[0]!r}", param="transmitters") from None
        except UnitError as error:
            raise BlockError(f"{where}: {error}", param="transmitters") from None
        for key in ("deviation", "tone", "baud", "shift", "bandwidth"):
            value = tx.get(key)
            if isinstance(value, float) and not 0 < value <= (sample_rate if key == "bandwidth" else sample_rate / 2):
                most = "the sample rate" if key == "bandwidth" else "half the sample rate"
                raise BlockError(f"{where}.{key}: expected more than 0 Hz and at most {most} "
                                 f"({format_frequency(sample_rate if key == 'bandwidth' else sample_rate / 2)}), got "
                                 f"{format_frequency(value)}", param="transmitters")
        if not -300 <= tx["level"] <= 40:
            raise BlockError(f"{where}.level: expected a level from -300 dBFS to +40 dBFS, got {tx['level']:g} dBFS",
                             param="transmitters")
        offset = tx["frequency"] - centre
        if abs(offset) >= sample_rate / 2:
            raise BlockError(f"{where}: {format_frequency(tx['frequency'])} is outside the band "
                             f"{format_frequency(centre - sample_rate / 2)} .. {format_frequency(centre + sample_rate / 2)}",
                             param="transmitters")
        tx["offset"] = offset
        tx["amplitude"] = 10 ** (tx["level"] / 20)
        out.append(tx)
    return out


def keying(t: np.ndarray, intervals: list[tuple[float, float]] | None) -> np.ndarray:
    """0..1 on/off envelope at times ``t`` (s) with raised-cosine ramps."""
    env = np.zeros_like(t)
    for start, stop in intervals or ():
        up = np.clip((t - start) / RAMP_SECONDS, 0, 1)
        down = np.clip((stop - t) / RAMP_SECONDS, 0, 1)
        env = np.maximum(env, np.minimum(0.5 - 0.5 * np.cos(np.pi * up), 0.5 - 0.5 * np.cos(np.pi * down)))
    return env


def voice_like(t: np.ndarray) -> np.ndarray:
    """Deterministic voice-like audio at times ``t`` (s), peak about 1."""
    # pitch 185 + 65 sin(2 pi 0.7 t) Hz, integrated in closed form so chunks join seamlessly
    phase = 2 * np.pi * (185 * t - 65 / (2 * np.pi * 0.7) * np.cos(2 * np.pi * 0.7 * t))
    tone = sum(np.sin(h * phase) / h for h in (1, 2, 3, 4, 5))
    syllables = np.clip(np.sin(2 * np.pi * 4.1 * t) * np.sin(2 * np.pi * 0.53 * t + 1.0), 0, None) ** 0.5
    return 0.6 * tone * syllables


class _Transmitter:
    """Streaming generator of one transmitter; continuous in phase across chunks."""

    def __init__(self, tx: dict[str, Any], rate: float, rng: np.random.Generator) -> None:
        self.tx = tx
        self.rate = rate
        self.rng = rng
        self.phase = 0.0          # accumulated modulation phase (fm, fsk)
        self.bits_made = 0        # fsk: bits drawn so far
        self.last_bit = 0
        self.filter_state = np.zeros(0, dtype=np.complex128)
        if tx["kind"] == "noise":
            import scipy.signal
            # a sharp band edge (about 3 kHz wide at 800 kHz, 100 dB down) so the
            # interferer stays inside the band it is declared with
            cutoff = min(0.99, tx["bandwidth"] / rate)
            self.taps = scipy.signal.firwin(2049, cutoff, window=("kaiser", 10.0))
            self.filter_state = np.zeros(len(self.taps) - 1, dtype=np.complex128)

    def audio(self, t: np.ndarray) -> np.ndarray:
        tone = self.tx.get("tone", 1000.0)
        return voice_like(t) if tone == "voice" else np.sin(2 * np.pi * tone * t)

    def chunk(self, first: int, n: int) -> np.ndarray:
        tx, rate = self.tx, self.rate
        t = (first + np.arange(n)) / rate
        carrier = np.exp(2j * np.pi * ((tx["offset"] * (first + np.arange(n))) % rate) / rate)
        kind = tx["kind"]
        if kind == "cw":
            signal = carrier
        elif kind == "am":
            signal = carrier * (1 + tx["depth"] * self.audio(t)) / np.sqrt(1 + tx["depth"] ** 2 / 2)
        elif kind == "fm":
            increments = 2 * np.pi * tx["deviation"] * self.audio(t) / rate
            phases = self.phase + np.cumsum(increments)
            self.phase = float(phases[-1] % (2 * np.pi))
            signal = carrier * np.exp(1j * phases)
        elif kind == "fsk":
            # bit k covers samples [k, k + 1) * rate / baud; bits are drawn in order, once each
            bit_of = np.floor((first + np.arange(n)) * tx["baud"] / rate).astype(np.int64)
            lo, hi = int(bit_of[0]), int(bit_of[-1])
            table = np.empty(hi - lo + 1, dtype=np.int64)
            fresh = max(lo, self.bits_made)
            if lo < self.bits_made:
                table[:self.bits_made - lo] = self.last_bit
            table[fresh - lo:] = self.rng.integers(0, 2, hi - fresh + 1)
            self.bits_made, self.last_bit = hi + 1, int(table[-1])
            increments = 2 * np.pi * (tx["shift"] / 2) * (2 * table[bit_of - lo] - 1) / rate
            phases = self.phase + np.cumsum(increments)
            self.phase = float(phases[-1] % (2 * np.pi))
            signal = carrier * np.exp(1j * phases)
        else:  # noise
            import scipy.signal

            white = self.rng.standard_normal(2 * n).view(np.complex128) / np.sqrt(2)
            full = scipy.signal.oaconvolve(white, self.taps)       # overlap-add across chunks
            full[:len(self.filter_state)] += self.filter_state
            shaped, self.filter_state = full[:n], full[n:n + len(self.taps) - 1].copy()
            signal = carrier * shaped / np.sqrt(np.sum(self.taps ** 2))
        return tx["amplitude"] * keying(t, tx["on"]) * signal


class Scenario(Block):
    type_name = "scenario"
    summary = "Generate a seeded synthetic band: noise floor plus CW, AM, FM, FSK and wideband transmitters."
    details = transmitter_keys()
    is_source = True
    length_parameter = "duration"
    parameters = (
        Param("sample_rate", "quantity", "sample rate of the band", unit="Hz", minimum=1.0),
        Param("centre_frequency", "quantity", "RF frequency at the band's centre", default=0.0, unit="Hz"),
        Param("duration", "quantity", "length of the scenario", unit="s", minimum=0.0),
        Param("noise", "quantity", "white-noise power over the whole band", default=-80.0, unit="dBFS"),
        Param("transmitters", "list", "the transmitters, one inline table each (keys below)", default=[]),
        Param("seed", "int", "random seed: the same seed gives the same band", default=1, minimum=0,
              maximum=(1 << 63) - 1),
        Param("chunk_size", "int", "samples per message", default=65536, minimum=1, maximum=1 << 24),
        Param("pace", "bool", "deliver at the sample rate, as a live receiver would", default=False),
    )
    outputs = (Port("samples", "samples", "the synthetic band, IQ"),)

    def output_streams(self, inputs: dict[str, StreamInfo]) -> dict[str, StreamInfo]:
        parse_transmitters(self.params["transmitters"], self.params["sample_rate"],
                           self.params["centre_frequency"])
        return {"samples": StreamInfo("samples", "cf32", self.params["sample_rate"],
                                      self.params["centre_frequency"])}

    def start(self, inputs: dict[str, StreamInfo]) -> None:
        rate = self.params["sample_rate"]
        self.pacer: Pacer | None = None
        seeds = np.random.SeedSequence(self.params["seed"]).spawn(len(self.params["transmitters"]) + 1)
        self.noise_rng = np.random.default_rng(seeds[0])
        txs = parse_transmitters(self.params["transmitters"], rate, self.params["centre_frequency"])
        self.transmitters = [_Transmitter(tx, rate, np.random.default_rng(s)) for tx, s in zip(txs, seeds[1:])]
        self.total = int(round(self.params["duration"] * rate))
        self.index = 0
        self.noise_amplitude = np.sqrt(10 ** (self.params["noise"] / 10) / 2)

    def begin(self) -> None:
        self.pacer = Pacer(self.params["sample_rate"]) if self.params["pace"] else None

    def progress(self) -> tuple[int, int]:
        return self.index, self.total

    def produce(self) -> Output | None:
        if self.stopping or self.index >= self.total:
            return None
        n = min(self.params["chunk_size"], self.total - self.index)
        # drawn as interleaved pairs so that any chunk_size gives the same band
        x = self.noise_amplitude * self.noise_rng.standard_normal(2 * n).view(np.complex128)
        for tx in self.transmitters:
            x += tx.chunk(self.index, n)
        chunk = Chunk(x.astype(np.complex64), self.index)
        self.index += n
        if self.pacer:
            self.pacer.wait_until(self.index)
        return {"samples": [chunk]}
