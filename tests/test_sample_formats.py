"""Sample formats: each decoder against numpy written independently here, each encoder its inverse."""

import numpy as np
import pytest
from bandloom.blocks.sample_formats import FORMATS

# (component dtype, value of a stored component v): cf32/cf64 as is; ci16 v / 32768 and ci8 v / 128 (signed
# integers to full scale 1.0, common practice); cu8 (v - 127.5) / 127.5 (common practice, low-cost receivers).
INDEPENDENT = {
    "cf32": ("f4", lambda v: v), "cf64": ("f8", lambda v: v), "ci16": ("i2", lambda v: v / 32768),
    "ci8": ("i1", lambda v: v / 128), "cu8": ("u1", lambda v: (v - 127.5) / 127.5),
    "f32": ("f4", lambda v: v), "s16": ("i2", lambda v: v / 32768),
}


@pytest.mark.parametrize("name", sorted(FORMATS))
@pytest.mark.parametrize("order", ["little", "big"])
def test_decoding_matches_numpy(name, order, rng):
    """Raw components of every format and byte order decode to the values numpy computes from them."""
    kind, value = INDEPENDENT[name]
    dtype = np.dtype(kind).newbyteorder("<" if order == "little" else ">")
    if dtype.kind == "f":
        raw = rng.uniform(-1, 1, 64).astype(dtype)
    else:
        info = np.iinfo(dtype)
        raw = rng.integers(info.min, info.max, 64, endpoint=True).astype(dtype)
    expected = value(raw.astype(np.float64))
    got = FORMATS[name].decode(raw.tobytes(), order)
    if FORMATS[name].is_complex:
        expected = expected[0::2] + 1j * expected[1::2]
        assert got.dtype == np.complex64
    else:
        assert got.dtype == np.float32
    assert np.allclose(got, expected, rtol=1e-6, atol=1e-7)


@pytest.mark.parametrize("name", sorted(FORMATS))
def test_encoding_is_the_inverse_within_half_a_step(name, rng):
    """Encoding then decoding returns the samples to within half a quantisation step (exactly for floats)."""
    fmt = FORMATS[name]
    samples = rng.uniform(-0.99, 0.99, 200).astype(np.float32)
    if fmt.is_complex:
        samples = samples.view(np.complex64)
    back = fmt.decode(fmt.encode(samples).tobytes())
    step = fmt.scale if fmt.is_integer else 0.0
    error = back.view(np.float32) - samples.view(np.float32)          # per component, I and Q alike
    assert np.max(np.abs(error)) <= step / 2 + 1e-6


def test_full_scale_clips_to_the_integer_range():
    """+1.0 becomes 32767 and -1.0 becomes -32768 in ci16 and s16 (one scale, 32768, for every writer)."""
    assert FORMATS["ci16"].encode(np.array([1 - 1j, 2 + 0j], np.complex64)).tolist() == [32767, -32768, 32767, 0]
    assert FORMATS["s16"].encode(np.array([1.0, -1.0, 0.5], np.float32)).tolist() == [32767, -32768, 16384]
    assert FORMATS["cu8"].encode(np.array([1 + 0j, -1 + 0j], np.complex64)).tolist() == [255, 128, 0, 128]
