"""Hostile flow files: each refused in one line naming file, line and key, never a traceback or a hang.

The corpus in tests/hostile_flows holds one file per attack with its exact expected text; the generated
cases below are those too large to keep in the repository; the property test mutates a good flow at random
and holds check to its contract (FlowErrors or a Flow, nothing else) within a bounded time and memory.
"""

import time
import tracemalloc
from pathlib import Path

import pytest
from bandloom.runtime.cli import main
from bandloom.runtime.flow import FlowErrors, check_flow, load_flow
from bandloom.runtime.plugins import load_registry
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from runner import bandloom

HOSTILE = Path(__file__).parent / "hostile_flows"
CASES = sorted(p.stem for p in HOSTILE.glob("*.toml"))
REGISTRY = load_registry()


def test_the_corpus_is_broad():
    """At least 40 attacks, each with its expected text beside it."""
    assert len(CASES) >= 40
    assert all((HOSTILE / f"{name}.expected").exists() for name in CASES)


@pytest.mark.parametrize("name", CASES)
def test_each_attack_gets_its_exact_one_line_refusal(name, monkeypatch, capsys):
    """check exits 1 with exactly the expected lines: file, line, key path, and what would be right."""
    monkeypatch.chdir(HOSTILE)
    assert main(["check", f"{name}.toml"]) == 1
    captured = capsys.readouterr()
    assert captured.err == (HOSTILE / f"{name}.expected").read_text()
    assert "\x1b" not in captured.err and "\u202e" not in captured.err     # never printed raw


def check_text(tmp_path, text: bytes | str) -> str:
    flow = tmp_path / "attack.toml"
    flow.write_bytes(text if isinstance(text, bytes) else text.encode())
    done = bandloom("check", flow, timeout=60)                 # a hang fails here
    assert done.returncode == 1, done.stderr
    assert "Traceback" not in done.stderr
    return done.stderr


def test_a_ten_megabyte_string_is_refused_by_size_without_echoing_it(tmp_path):
    """A 10 MB value: the file is refused by its size; nothing of the value is printed."""
    stderr = check_text(tmp_path, '[blocks.a]\ntype = "' + "x" * 10_000_000 + '"\n')
    assert "flow files are at most 1048576 bytes (1 MiB)" in stderr
    assert len(stderr) < 500


def test_a_long_value_is_shortened_in_the_message(tmp_path):
    """A 500 kB block type (under the size limit) is echoed shortened, with its length."""
    stderr = check_text(tmp_path, '[blocks.a]\ntype = "' + "y" * 500_000 + '"\n')
    assert "(500000 characters)" in stderr
    assert len(stderr) < 1000


def test_a_crafted_multi_line_string_does_not_make_the_locator_backtrack(tmp_path):
    """Lines that look like the start of a table header, with long runs of spaces, inside a multi-line
    string: locating the problem's line stays linear (the old pattern took minutes)."""
    bait = ("[ blocks" + " " * 200_000 + "x\n") * 4
    stderr = check_text(tmp_path, f'[blocks.a]\ntype = "discard"\nnote = """\n{bait}"""\n')
    assert "attack.toml:3: blocks.a.note: discard has no parameter 'note'" in stderr


def test_ten_thousand_blocks_are_refused_before_anything_runs(tmp_path):
    """A flow of 10,000 processes: check says so (the limit is overridable), nothing is spawned."""
    text = "".join(f'[blocks.s{i}]\ntype = "discard"\n' for i in range(10_000))
    stderr = check_text(tmp_path, text)
    assert "10000 block processes" in stderr and "max_processes" in stderr


# -- a property: check never raises anything but FlowErrors, and stays bounded -------------------------------

GOOD = '''[blocks.band]
type = "scenario"
sample_rate = "1 MHz"
duration = "0.1 s"
transmitters = [{ kind = "cw", frequency = "100 kHz", level = "-20 dBFS" }]

[blocks.split]
type = "channelizer"
channels = 8

[blocks.keep]
type = "iq-writer"
path = "ch{channel:02d}.cf32"
per_channel = { from = "split.channels", select = [1, "2..3"] }

[[links]]
from = "band.samples"
to = "split.samples"
'''

NASTY = st.sampled_from(["nan", "inf", "-inf", "1e400", "9" * 70, "[" * 40, "{a=", '"\\u001b[2J"', '"../x"', '"/x"',
                         '"{channel:{x}}"', '"{frequency:>999}"', "[[[]]]", "true", "{}", '"0..99999999999"', "''",
                         '"""', "\\", "=", "\n[blocks.x]\n", '"~/x"', "-0", "0x7fffffffffffffff", '"\\ud800"'])


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(position=st.integers(0, len(GOOD)), removed=st.integers(0, 12), inserted=st.lists(NASTY, max_size=3))
def test_check_never_raises_hangs_or_allocates_beyond_a_bound(tmp_path, position, removed, inserted):
    """Any mutation of a good flow: load_flow gives a Flow or FlowErrors, without hanging and within 64 MiB."""
    flow = tmp_path / "mutated.toml"
    flow.write_text(GOOD[:position] + " ".join(inserted) + GOOD[position + removed:], encoding="utf-8",
                    errors="surrogatepass")
    tracemalloc.start()
    started = time.monotonic()
    try:
        load_flow(flow, REGISTRY, output_dir=tmp_path / "out")
    except FlowErrors as errors:
        assert all("\x1b" not in str(p) for p in errors.problems)
    finally:
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
    assert time.monotonic() - started < 30.0, "check hung"     # a hang guard (checks take milliseconds), not a speed target
    assert peak < 64 << 20


FLOWS = Path(__file__).parent.parent / "flows"
HOSTILE_VALUES = ["../../../etc/passwd", "/", "a\x00b", "x" * 300, float("nan"), float("inf"), -1, 2**63, 10**400,
                  [[[[1]]]], {"a": {"b": {}}}, "{0.__class__}"]


def _value_positions(value, prefix=()):
    """Every key path into a parsed flow: table keys and list indexes, outermost first."""
    items = value.items() if isinstance(value, dict) else enumerate(value) if isinstance(value, list) else ()
    for key, inner in items:
        yield prefix + (key,)
        yield from _value_positions(inner, prefix + (key,))


@pytest.mark.parametrize("flow", sorted(FLOWS.glob("*.toml")) + sorted((FLOWS / "bench").glob("*.toml")),
                         ids=lambda p: p.name)
def test_every_value_of_every_example_flow_replaced_by_a_hostile_one_is_refused_cleanly(flow, tmp_path):
    """Each value (and table) of each shipped flow replaced in turn by each of twelve hostile values (a path
    out of the folder, the root folder, a NUL character, a name longer than file systems take, non-finite
    and huge numbers, a 401-digit integer as a mapping made in code or a --set may give, deep nesting, a
    placeholder reaching into Python): the check gives a Flow or FlowErrors, nothing else. The byte-level
    mutations above rarely make a value of the right shape in the right place; this sweep found a
    selection written as a path raising a bare unpacking error, a reader's path of "/" or with a NUL and
    an over-long key folder name raising the OS's errors, and huge integers overflowing float()."""
    import copy
    import tomllib
    base = tomllib.loads(flow.read_text())
    for position in _value_positions(base):
        for hostile in HOSTILE_VALUES:
            data = copy.deepcopy(base)
            table = data
            for key in position[:-1]:
                table = table[key]
            table[position[-1]] = copy.deepcopy(hostile)
            try:
                check_flow(data, REGISTRY, path=flow, output_dir=tmp_path)
            except FlowErrors as errors:
                assert all("\x1b" not in str(p) for p in errors.problems)
            except Exception as error:     # noqa: BLE001 - what the test is for
                pytest.fail(f"{flow.name}: {'.'.join(map(str, position))} = {repr(hostile)[:80]}: "
                            f"{type(error).__name__}: {error}")


# -- recording metadata from strangers ----------------------------------------------------------------------

METADATA_FLOW = ('[blocks.src]\ntype = "iq-reader"\npath = "rec.sigmf-data"\n[blocks.sink]\ntype = "discard"\n'
                 '[[links]]\nfrom = "src.samples"\nto = "sink.samples"\n')


@pytest.mark.parametrize("meta,expected", [
    ('{"global": {"core:datatype": "cf32_le", "core:sample_rate": 1e6}, "captures": 5}',
     "captures: expected a list of objects, got 5"),
    ('{"global": {"core:datatype": 7, "core:sample_rate": 1e6}}',
     'global.core:datatype: expected text such as "cf32_le", got 7'),
    ('{"global": {"core:datatype": "cf32_le", "core:sample_rate": -5}}',
     "global.core:sample_rate: expected a sample rate in Hz, a finite number above 0, got -5"),
    ('{"global": {"core:datatype": "cf32_le", "core:sample_rate": "fast"}}',
     'global.core:sample_rate: expected a sample rate in Hz, a finite number above 0, got "fast"'),
    ('{"global": {"core:datatype": "cf32_le", "core:sample_rate": NaN}}',
     "global.core:sample_rate: expected a sample rate in Hz, a finite number above 0, got nan"),
    ('{"global": {"core:datatype": "cf32_le", "core:sample_rate": 1e6}, "captures": [{"core:frequency": 1e999}]}',
     "captures[0].core:frequency: expected a frequency in Hz, a finite number, got inf"),
    ('{"global": [1, 2]}', "global: expected an object, got a JSON array of 2 items"),
    ('{"global": {"core:datatype": "cf32_le", "core:sample_rate": 1' + "0" * 400 + '}}',
     "global.core:sample_rate: expected a sample rate in Hz, a finite number above 0, got 1000"),
    ('{"global": ' + "[" * 100_000 + "]" * 100_000 + "}", "not JSON (nested too deeply)"),
    ("[]", "(top level): expected a JSON object"),
])
def test_hostile_recording_metadata_is_refused_naming_the_file_and_field(tmp_path, monkeypatch, capsys, meta, expected):
    """A .sigmf-meta from a stranger (fields of the SigMF core namespace, checked as the flow's own values are):
    one line naming the metadata file and the field, exit 1, never a traceback."""
    import numpy as np
    np.zeros(100, np.complex64).tofile(tmp_path / "rec.sigmf-data")
    (tmp_path / "rec.sigmf-meta").write_text(meta)
    (tmp_path / "f.toml").write_text(METADATA_FLOW)
    monkeypatch.chdir(tmp_path)
    assert main(["check", "f.toml"]) == 1
    err = capsys.readouterr().err
    assert err.startswith("f.toml:1: blocks.src.metadata: ") and expected in err, err
    assert err.count("\n") == 2


# -- WAV files from strangers ---------------------------------------------------------------------------------

def _wav_cases() -> dict[str, bytes]:
    """A good two-channel WAV (RIFF layout: fmt fields at fixed offsets, 44-byte header) and damaged ones."""
    import io
    import struct

    import numpy as np
    import scipy.io.wavfile
    buffer = io.BytesIO()
    scipy.io.wavfile.write(buffer, 48000, np.zeros((1000, 2), np.int16))
    good = buffer.getvalue()
    return {"no channels": good[:22] + struct.pack("<H", 0) + good[24:],
            "block align of zero": good[:32] + struct.pack("<H", 0) + good[34:],
            "header cut off": good[:30],
            "samples cut off": good[:44 + 400]}


@pytest.mark.parametrize("case", sorted(_wav_cases()))
def test_a_damaged_wav_recording_is_refused_naming_the_file_not_with_a_traceback(tmp_path, monkeypatch, capsys, case):
    """scipy's WAV parser raises ZeroDivisionError, struct.error and others for damaged headers (found by
    flipping header bytes at random): each is one line naming the flow's key and the file, exit 1."""
    (tmp_path / "x.wav").write_bytes(_wav_cases()[case])
    (tmp_path / "f.toml").write_text('[blocks.src]\ntype = "wav-reader"\npath = "x.wav"\n[blocks.sink]\n'
                                     'type = "discard"\n[[links]]\nfrom = "src.samples"\nto = "sink.samples"\n')
    monkeypatch.chdir(tmp_path)
    assert main(["check", "f.toml"]) == 1
    err = capsys.readouterr().err
    assert err.startswith("f.toml:3: blocks.src.path: cannot read x.wav as WAV (") and err.count("\n") == 2, err
