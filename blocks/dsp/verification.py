"""Measuring a bank with test signals: round-trip quality and tone-measured channel response.

Everything here works on the banks as they run (complex64, fast kernels), so
the figures describe the implementation, not only the taps. Frequencies are
in channel spacings (``fs / M``) relative to a channel's centre, levels in dB.

Test signals (unit RMS, complex):

* ``noise``: complex white Gaussian noise (seeded);
* ``comb``: equal tones at every channel centre (k/M), every channel edge
  ((k + 1/2)/M) and a quarter of the way between (k + 1/4)/M, random phases;
* ``chirp``: a linear chirp sweeping the whole band once, -fs/2 to +fs/2;
* ``tone``: one tone 0.3 channel spacings above the centre of channel 3.
  Aliases and images of a DFT bank with decimation D lie at multiples of the
  channel rate (M/D spacings) from the tone; the comb cannot show them (they
  land on other comb tones), the single tone does.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .banks import AnalysisBank
from .design import BankDesign
from .errors import ParameterError

__all__ = [
    "SIGNALS", "SignalResult", "TONE_OFFSET", "ToneMeasurement", "analyse_round_trip", "comb_frequencies",
    "estimate_delay", "measure_channel_response", "probe_signal", "round_trip_in_process"
]

SIGNALS = ("noise", "comb", "chirp", "tone")
TONE_OFFSET = 3.3          # channel spacings: the single tone's frequency times M


def probe_signal(kind: str, length: int, channels: int, *, seed: int = 0) -> np.ndarray:
    """One of SIGNALS, ``length`` complex64 samples, unit RMS (see module doc)."""
    rng = np.random.default_rng(seed)
    m = np.arange(length)
    if kind == "noise":
        x = rng.standard_normal(2 * length).view(np.complex128) / np.sqrt(2)
    elif kind == "comb":
        offsets = np.concatenate([np.arange(channels), np.arange(channels) + 0.5, np.arange(channels) + 0.25])
        x = np.zeros(length, np.complex128)
        for f, phase in zip(offsets / channels, rng.uniform(0, 2 * np.pi, len(offsets))):
            x += np.exp(1j * (2 * np.pi * f * m + phase))
        x /= np.sqrt(len(offsets))
    elif kind == "chirp":
        t = m / length
        x = np.exp(1j * 2 * np.pi * length * (-0.5 * t + 0.5 * t * t))
    elif kind == "tone":
        x = np.exp(2j * np.pi * (TONE_OFFSET / channels) * m)
    else:
        raise ParameterError(f"Parameter kind={kind!r} is not one of {SIGNALS}!", param="kind")
    return x.astype(np.complex64)


def comb_frequencies(channels: int) -> np.ndarray:
    """The comb's tone frequencies in cycles per sample."""
    offsets = np.concatenate([np.arange(channels), np.arange(channels) + 0.5, np.arange(channels) + 0.25])
    return np.mod(offsets / channels + 0.5, 1.0) - 0.5


def estimate_delay(reference: np.ndarray, output: np.ndarray, max_delay: int) -> int:
    """Lag (0..max_delay) maximising |sum output[m + d] conj(reference[m])| by FFT cross-correlation."""
    size = 1 << int(np.ceil(np.log2(len(reference) + len(output))))
    corr = np.fft.ifft(np.fft.fft(output, size) * np.conj(np.fft.fft(reference, size)))
    return int(np.argmax(np.abs(corr[:max_delay + 1])))


@dataclass
class SignalResult:
    """Round-trip figures for one test signal (levels in dB relative to the input)."""

    signal: str
    delay: int
    error_db: float
    gain_db: float
    phase_degrees: float
    error_after_gain_db: float
    band_error_db: np.ndarray = field(repr=False)          # per channel (FFT order), relative to the input's
                                                          # mean power per channel band
    spur_db: float | None = None                          # comb only: worst output away from the tones
    alias_db: float | None = None                         # tone only: worst alias/image relative to the tone
    spectrum: tuple = field(default=(), repr=False)       # (frequencies, input dB, error dB) for plots

    def worst_channel(self) -> tuple[int, float]:
        k = int(np.argmax(self.band_error_db))
        return k, float(self.band_error_db[k])


def _db(x: Any) -> Any:
    return 10 * np.log10(np.maximum(x, 1e-30))


def _level_at(signal: np.ndarray, window: np.ndarray, frequency: float) -> float:
    m = np.arange(len(signal))
    return abs(np.sum(signal * window * np.exp(-2j * np.pi * frequency * m))) ** 2


def analyse_round_trip(signal_name: str, x: np.ndarray, y: np.ndarray, channels: int, *, expected_delay: int | None = None,
                       max_delay: int | None = None, decimation: int | None = None) -> SignalResult:
    """Compare input ``x`` with round-trip output ``y`` (same rate); see SignalResult."""
    x = np.asarray(x, dtype=np.complex128)
    y = np.asarray(y, dtype=np.complex128)
    max_delay = max_delay or min(len(x) // 2, 1 << 20)
    delay = expected_delay if expected_delay is not None else estimate_delay(x[:len(x) // 2], y, max_delay)
    # steady state: skip one delay of start-up, compare where both exist
    start = min(delay, len(y) - delay - 1)
    ref = x[start:len(y) - delay]
    out = y[start + delay:]
    err = out - ref
    ref_power = np.mean(np.abs(ref) ** 2)
    cross = np.vdot(ref, out) / np.vdot(ref, ref)
    residual = out - cross * ref
    # error per channel band: windowed spectra of the whole aligned stretch, summed over each channel's
    # bins, relative to the input's mean power per band (so a band the input barely visits is not
    # judged against its own tiny power)
    n = len(ref)
    window = _blackman_harris(n)
    spec_ref = np.abs(np.fft.fft(ref * window)) ** 2
    spec_err = np.abs(np.fft.fft(err * window)) ** 2
    freqs = np.fft.fftfreq(n)
    band = np.mod(np.round(freqs * channels), channels).astype(int)
    band_err = np.bincount(band, spec_err, minlength=channels)
    band_error_db = _db(band_err / (spec_ref.sum() / channels))
    spur = None
    if signal_name == "comb":
        spec_out = np.abs(np.fft.fft(out * window)) ** 2
        tone_bins = np.round(comb_frequencies(channels) * n).astype(int) % n
        mask = np.ones(n, bool)
        for b in tone_bins:
            mask[np.arange(b - 8, b + 9) % n] = False     # Blackman-Harris main lobe is +-4 bins
        spur = float(_db(spec_out[mask].max() / spec_out[tone_bins].mean()))
    alias = None
    if signal_name == "tone" and decimation:
        rate = (channels // decimation) / channels              # the channel rate, cycles per sample
        f0 = TONE_OFFSET / channels
        tone = _level_at(out, window, f0)
        images = [np.mod(f0 + n * rate + 0.5, 1.0) - 0.5 for n in range(1, decimation)]
        alias = float(_db(max(_level_at(out, window, f) for f in images) / tone)) if images else None
    order = np.argsort(freqs)
    return SignalResult(
        signal=signal_name, delay=int(delay), error_db=float(_db(np.mean(np.abs(err) ** 2) / ref_power)),
        gain_db=float(20 * np.log10(abs(cross))), phase_degrees=float(np.degrees(np.angle(cross))),
        error_after_gain_db=float(_db(np.mean(np.abs(residual) ** 2) / ref_power)),
        band_error_db=band_error_db, spur_db=spur, alias_db=alias,
        spectrum=(freqs[order] * channels, _db(spec_ref[order] / spec_ref.max()), _db(spec_err[order] / spec_ref.max())))


def _blackman_harris(n: int) -> np.ndarray:
    import scipy.signal
    return scipy.signal.get_window("blackmanharris", n, fftbins=True)


def round_trip_in_process(design: BankDesign, signals: Sequence[str] = SIGNALS, *, frames: int = 64,
                          seed: int = 0) -> list[SignalResult]:
    """Run each test signal through the design's banks in this process; list of SignalResult."""
    M = design.channels
    length = max(frames * M, 1 << 14) + 2 * design.delay
    results = []
    for name in signals:
        x = probe_signal(name, length, M, seed=seed)
        y = design.synthesis_bank().process(design.analysis_bank().process(x))
        results.append(analyse_round_trip(name, x, y, M, expected_delay=design.delay,
                                          decimation=design.decimation))
    return results


@dataclass
class ToneMeasurement:
    """A channel's response measured with tones (see measure_channel_response)."""

    offsets: np.ndarray           # channel spacings from the centre, sorted
    level_db: np.ndarray          # output power relative to a tone at the centre
    enbw_bins: float
    decimation: int
    channels: int

    def figures(self, passband_edge: float) -> dict[str, float]:
        f, lv = self.offsets, self.level_db
        flat = lv[np.abs(f) <= passband_edge + 1e-9]
        p = self.channels // self.decimation
        alias = lv[np.abs(f) >= p - 0.5 - 1e-9]
        edge = np.interp(0.5, f, lv)
        return {
            "passband_ripple_db": float(flat.max() - flat.min()),
            "edge_response_db": float(edge),
            "scalloping_loss_db": float(-min(edge, np.interp(-0.5, f, lv))),
            "adjacent_rejection_db": float(-lv[np.abs(f) >= 1 - 1e-9].max()),
            "alternate_rejection_db": float(-lv[np.abs(f) >= 2 - 1e-9].max()),
            "alias_rejection_db": float(-alias.max()) if len(alias) else float("inf"),
            "enbw_bins": float(self.enbw_bins),
        }


def measure_channel_response(bank_factory: Callable[[], AnalysisBank], channels: int, *, steps_per_spacing: int = 32,
                             frames: int | None = None, span: float | None = None, seed: int = 0) -> ToneMeasurement:
    """Measure |H| of the channels with tones run through a real analysis bank.

    ``bank_factory()`` returns a fresh AnalysisBank. A tone at ``f`` cycles per
    sample appears in channel k with the power ``|H(f - k/M)|^2`` (the mixing
    makes the bank's response the same for every channel), so one tone
    measures all M offsets ``f*M - k`` at once; ``steps_per_spacing`` tones
    across one spacing give the response on that grid over the whole band.
    The response is normalised to the tone at a channel centre. ENBW comes
    from white noise: output noise power per channel over input power / M.
    """
    probe = bank_factory()
    taps_per_branch = -(-len(probe.taps) // channels)
    settle = taps_per_branch * probe.oversampling + 2      # frames until the window is full of tone
    frames = frames or (settle + 64)
    length = frames * probe.decimation
    m = np.arange(length)
    offset_parts: list[np.ndarray] = []
    level_parts: list[np.ndarray] = []
    for j in range(steps_per_spacing):
        f = j / steps_per_spacing / channels
        tone = np.exp(2j * np.pi * f * m).astype(np.complex64)
        out = bank_factory().process(tone)[settle:]
        power = np.mean(np.abs(out.astype(np.complex128)) ** 2, axis=0)      # one value per channel
        k = np.arange(channels)
        offset = (j / steps_per_spacing - k + channels / 2) % channels - channels / 2
        offset_parts.append(offset)
        level_parts.append(power)
    offsets = np.concatenate(offset_parts)
    levels = np.concatenate(level_parts)
    order = np.argsort(offsets)
    offsets, levels = offsets[order], levels[order]
    centre = levels[np.argmin(np.abs(offsets))]
    level_db = 10 * np.log10(np.maximum(levels / centre, 1e-30))
    if span is not None:
        keep = np.abs(offsets) <= span
        offsets, level_db = offsets[keep], level_db[keep]
    rng = np.random.default_rng(seed)
    noise = (rng.standard_normal(2 * 64 * length).view(np.complex128) / np.sqrt(2)).astype(np.complex64)
    out = bank_factory().process(noise)[settle:]
    enbw = float(np.mean(np.abs(out.astype(np.complex128)) ** 2) * channels / centre)
    return ToneMeasurement(offsets, level_db, enbw, probe.decimation, channels)
