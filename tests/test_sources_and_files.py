"""Readers against data written independently with numpy; writers' SigMF metadata against the published schema."""

import json
import re
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import scipy.io.wavfile
from bandloom.blocks.block import BlockContext
from bandloom.runtime.plugins import load_registry
from conftest import complex_noise

REGISTRY = load_registry()


def make_block(type_name, params, tmp_path, name="b"):
    """Build a block the way a worker does: declared defaults, then the given parameters."""
    cls = REGISTRY.types[type_name]
    full = {p.name: p.default for p in cls.parameters if not p.required}
    full.update(params)
    return cls(full, BlockContext(name, tmp_path / "flow.toml", tmp_path))


def drain(block, inputs=None):
    block.output_streams(inputs or {})
    block.start(inputs or {})
    block.begin()
    parts = []
    while (produced := block.produce()) is not None:
        for chunk in produced.get("samples", []):
            parts.append((chunk.first_index, chunk.data))
    block.close()
    return parts


def truth_components(rng, n):
    return rng.uniform(-0.99, 0.99, size=2 * n)


# component layout written with plain numpy, and the value each component should read back as
FORMATS = {
    "cf32": (lambda v: v.astype("f4"), lambda v: v),
    "cf64": (lambda v: v.astype("f8"), lambda v: v),
    "ci16": (lambda v: np.round(v * 32768).astype("i2"), lambda v: np.round(v * 32768) / 32768),
    "ci8": (lambda v: np.round(v * 128).astype("i1"), lambda v: np.round(v * 128) / 128),
    "cu8": (lambda v: np.round(v * 127.5 + 127.5).astype("u1"), lambda v: (np.round(v * 127.5 + 127.5) - 127.5) / 127.5),
}


@pytest.mark.parametrize("byte_order", ["little", "big"])
@pytest.mark.parametrize("fmt", sorted(FORMATS))
def test_iq_reader_reads_every_format(tmp_path, rng, fmt, byte_order):
    """Each format and byte order reads back the values numpy wrote; cu8 is (v - 127.5) / 127.5 (common practice)."""
    values = truth_components(rng, 5000)
    encode, expected = FORMATS[fmt]
    raw = encode(values)
    if byte_order == "big":
        raw = raw.astype(raw.dtype.newbyteorder(">"))
    raw.tofile(tmp_path / "x.raw")
    parts = drain(make_block("iq-reader", dict(path="x.raw", format=fmt, byte_order=byte_order, sample_rate=1e6,
                                               chunk_size=777), tmp_path))
    got = np.concatenate([d for _, d in parts])
    want = expected(values.astype(np.float64))
    assert np.allclose(got.real, want[0::2], atol=1e-6) and np.allclose(got.imag, want[1::2], atol=1e-6)
    assert [i for i, _ in parts] == list(range(0, 5000, 777))


def test_iq_reader_start_duration_and_repeat(tmp_path, rng):
    """start and duration pick a slice in seconds; repeat plays it again with absolute indices continuing."""
    x = complex_noise(rng, 1000)
    x.tofile(tmp_path / "x.cf32")
    parts = drain(make_block("iq-reader", dict(path="x.cf32", sample_rate=1000.0, start=0.1, duration=0.2,
                                               repeat=2, chunk_size=64), tmp_path))
    got = np.concatenate([d for _, d in parts])
    assert np.array_equal(got, np.concatenate([x[100:300], x[100:300]]))
    assert parts[-1][0] + len(parts[-1][1]) == 400


def test_iq_reader_refuses_partial_sample_unless_told(tmp_path, capsys):
    """A file that is not a whole number of samples is an error naming the byte count, or dropped with a warning."""
    (tmp_path / "x.cf32").write_bytes(b"\x00" * 8 * 10 + b"\x01\x02\x03")
    from bandloom.blocks.block import BlockError
    with pytest.raises(BlockError, match="holds 83 bytes, not a whole number of 8-byte cf32 samples"):
        make_block("iq-reader", dict(path="x.cf32", sample_rate=1e3), tmp_path).output_streams({})
    parts = drain(make_block("iq-reader", dict(path="x.cf32", sample_rate=1e3, trailing_bytes="drop"), tmp_path))
    assert sum(len(d) for _, d in parts) == 10
    assert "dropping the last 3 bytes" in capsys.readouterr().err


def test_iq_reader_takes_settings_from_sigmf_metadata(tmp_path, rng):
    """Format, byte order, rate, frequency and start time come from the SigMF file beside the data."""
    values = truth_components(rng, 300)
    np.round(values * 32768).astype(">i2").tofile(tmp_path / "cap.sigmf-data")
    (tmp_path / "cap.sigmf-meta").write_text(json.dumps({
        "global": {"core:datatype": "ci16_be", "core:sample_rate": 2.4e6, "core:version": "1.2.0"},
        "captures": [{"core:sample_start": 0, "core:frequency": 433.92e6, "core:datetime": "2026-11-30T10:00:00Z"}],
        "annotations": []}))
    block = make_block("iq-reader", dict(path="cap.sigmf-data"), tmp_path)
    stream = block.output_streams({})["samples"]
    assert (stream.sample_rate, stream.centre_frequency, stream.start_time) == (2.4e6, 433.92e6, "2026-11-30T10:00:00Z")
    got = np.concatenate([d for _, d in drain(block)])
    assert np.allclose(got.real, np.round(values[0::2] * 32768) / 32768)


def test_wav_reader_reads_i_and_q(tmp_path, rng):
    """A two-channel int16 WAV written by scipy.io.wavfile reads as I (left) + jQ (right), rate from the file."""
    pcm = (rng.uniform(-1, 1, size=(4000, 2)) * 32767).astype(np.int16)
    scipy.io.wavfile.write(tmp_path / "iq.wav", 96000, pcm)
    block = make_block("wav-reader", dict(path="iq.wav", chunk_size=1000), tmp_path)
    assert block.output_streams({})["samples"].sample_rate == 96000
    got = np.concatenate([d for _, d in drain(block)])
    assert np.allclose(got, (pcm[:, 0] + 1j * pcm[:, 1]) / 32768)


def _sigmf_schema():
    import sigmf
    return json.loads((Path(sigmf.__file__).parent / "schema-meta.json").read_text())


def test_writer_metadata_follows_the_sigmf_schema(tmp_path, rng):
    """iq-writer's .sigmf-meta validates against the SigMF schema shipped by the sigmf package (open standard)."""
    import jsonschema
    from bandloom.blocks.block import Chunk, StreamInfo
    block = make_block("iq-writer", dict(path="ch7.sigmf-data"), tmp_path, name="keep[7]")
    stream = StreamInfo("samples", "cf32", 50e3, 160.675e6, channels=(7,), channel_frequencies=(160.675e6,),
                        start_time="2026-12-01T21:00:00Z")
    block.output_streams({"samples": stream})
    block.start({"samples": stream})
    x = complex_noise(rng, 100)
    block.consume("samples", Chunk(x, 0))
    block.consume("samples", Chunk(x, 130, discontinuity=True, dropped=30))
    block.close()
    meta = json.loads((tmp_path / "ch7.sigmf-meta").read_text())
    jsonschema.validate(meta, _sigmf_schema())
    assert meta["global"]["core:datatype"] == "cf32_le" and meta["global"]["core:sample_rate"] == 50e3
    assert meta["captures"][0]["core:frequency"] == 160.675e6
    assert meta["captures"][0]["core:datetime"] == "2026-12-01T21:00:00Z"
    assert "keep[7]" in meta["global"]["core:description"]
    assert meta["annotations"][0]["core:sample_start"] == 100 and meta["annotations"][0]["core:sample_count"] == 30
    data = np.fromfile(tmp_path / "ch7.sigmf-data", np.complex64)
    assert np.array_equal(data, np.concatenate([x, np.zeros(30, np.complex64), x]))


def test_stdin_source_faster_than_the_flow_counts_every_drop(tmp_path, rng):
    """A live producer faster than the flow: drops are counted and flagged; indices account for every sample."""
    total = 6_000_000
    block = (rng.standard_normal(2 * 100_000).astype(np.float32) * 0.1).tobytes()
    flow = tmp_path / "live.toml"
    flow.write_text('[blocks.live]\ntype = "stdin-reader"\nsample_rate = "8 MHz"\nwhen_full = "drop"\n'
                    'buffer = "5 ms"\nbuffer_size = 20000\n'
                    '[blocks.split]\ntype = "channelizer"\nchannels = 1024\n'
                    '[blocks.sink]\ntype = "discard"\nrate_limit = "2 kHz"\n'
                    '[[links]]\nfrom = "live.samples"\nto = "split.samples"\nqueue = 2\n'
                    '[[links]]\nfrom = "split.channels"\nto = "sink.samples"\nqueue = 2\n')
    report_path = tmp_path / "report.json"
    runner = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--quiet",
                               "--out", str(tmp_path), "--report", str(report_path)],
                              stdin=subprocess.PIPE, stderr=subprocess.PIPE)
    for _ in range(total // 100_000):
        runner.stdin.write(block)
    runner.stdin.close()
    stderr = runner.stderr.read()
    runner.wait(timeout=240)
    assert runner.returncode == 0, stderr.decode()
    report = json.loads(report_path.read_text())
    took, dropped = (int(v) for v in re.findall(r"took (\d+) samples; dropped (\d+) samples",
                                                 report["blocks"]["live"]["report"][0])[0])
    assert dropped > 0 and took + dropped == total            # every input sample taken or counted
    link = next(x for x in report["links"] if x["link"].startswith("live.samples"))
    assert link["sent_samples"] == took
    assert link["discontinuities"] > 0 and link["missing_samples"] == dropped and link["last_index"] == total
    rows, gaps, missing = (int(v) for v in re.findall(r"discarded (\d+) samples; (\d+) gaps, (\d+) samples missing",
                                                       report["blocks"]["sink"]["report"][0])[0])
    assert gaps > 0
    # the channelizer numbers its frames in absolute time: received + missing = every frame up to the last
    assert rows + missing == report["links"][1]["sent_samples"] + report["links"][1]["missing_samples"]


def test_udp_reader_skips_headers_and_keeps_order(tmp_path, rng):
    """Datagrams with a 4-byte header: the header is skipped and the samples arrive in order, none lost."""
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    x = complex_noise(rng, 40 * 256)
    flow = tmp_path / "udp.toml"
    # a deep queue: this test is about headers and order, not about dropping (tested above)
    flow.write_text(f'[blocks.radio]\ntype = "udp-reader"\nsample_rate = "48 kHz"\nport = {port}\nheader_bytes = 4\n'
                    'buffer = "60 s"\n'
                    'idle_timeout = "1.5 s"\n[blocks.keep]\ntype = "iq-writer"\npath = "udp.cf32"\n'
                    '[[links]]\nfrom = "radio.samples"\nto = "keep.samples"\n')
    runner = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--quiet",
                               "--out", str(tmp_path)], stderr=subprocess.PIPE)
    deadline = time.monotonic() + 60              # wait until the reader has bound the port (Linux /proc)
    while time.monotonic() < deadline and f":{port:04X} " not in Path("/proc/net/udp").read_text():
        time.sleep(0.2)
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as sender:
        for i in range(40):
            sender.sendto(i.to_bytes(4, "big") + x[i * 256:(i + 1) * 256].tobytes(), ("127.0.0.1", port))
            time.sleep(0.005)
    _, stderr = runner.communicate(timeout=60)
    assert runner.returncode == 0, stderr.decode()
    assert np.array_equal(np.fromfile(tmp_path / "udp.cf32", np.complex64), x)


@pytest.mark.parametrize("fmt,datatype", [("ci16", "ci16_le"), ("ci8", "ci8"), ("cu8", "cu8"), ("cf64", "cf64_le")])
def test_writer_formats_read_back_through_their_metadata(tmp_path, rng, fmt, datatype):
    """Every IQ format the writer takes is named in SigMF terms (no byte order for 8-bit types, per the
    SigMF schema's datatype pattern) and reads back through iq-reader from that metadata alone."""
    import jsonschema
    from bandloom.blocks.block import Chunk, StreamInfo
    writer = make_block("iq-writer", dict(path="rec.sigmf-data", format=fmt), tmp_path)
    stream = StreamInfo("samples", "cf32", 25e3, 156.8e6)
    writer.start({"samples": stream})
    x = 0.5 * complex_noise(rng, 500)
    x = (np.clip(x.real, -0.99, 0.99) + 1j * np.clip(x.imag, -0.99, 0.99)).astype(np.complex64)
    writer.consume("samples", Chunk(x, 0))
    writer.close()
    meta = json.loads((tmp_path / "rec.sigmf-meta").read_text())
    jsonschema.validate(meta, _sigmf_schema())
    assert meta["global"]["core:datatype"] == datatype
    reader = make_block("iq-reader", dict(path="rec.sigmf-data"), tmp_path)
    reader.start({})
    reader.begin()
    got = reader.produce()["samples"][0].data
    step = {"ci16": 1 / 32768, "ci8": 1 / 128, "cu8": 1 / 127.5, "cf64": 0.0}[fmt]
    assert len(got) == 500 and np.max(np.abs(got.view(np.float32) - x.view(np.float32))) <= step / 2 + 1e-6
    reader.close()
