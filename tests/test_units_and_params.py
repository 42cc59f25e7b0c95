"""Units as flow files write them, and declared parameters: the kinds table, conversion and refusals."""

import pytest
from bandloom.blocks.params import KINDS, Param
from bandloom.blocks.units import UnitError, format_frequency, parse_quantity
from bandloom.runtime.plugins import validate_block_class


@pytest.mark.parametrize("text,unit,value", [
    ("2.4 MHz", "Hz", 2.4e6), ("25 kHz", "Hz", 25e3), ("1e3", "Hz", 1e3), (".5 GHz", "Hz", 5e8),
    ("-30 dBFS", "dBFS", -30.0), ("1.5 s", "s", 1.5), ("750 us", "s", 750e-6), ("2 min", "s", 120.0),
    (48000, "Hz", 48000.0),
])
def test_quantities_convert_to_the_base_unit(text, unit, value):
    """SI prefixes scale to Hz and s (SI brochure prefixes k, M, G, m, u, n: standard definitions)."""
    assert parse_quantity(text, unit) == pytest.approx(value)


@pytest.mark.parametrize("text,unit,words", [
    ("1.6 mHz", "Hz", "millihertz; did you mean MHz?"),
    ("1.6 Mbps", "Hz", "is not a unit of Hz; use one of: Hz, kHz, MHz, GHz"),
    (True, "Hz", "got true"),
    ([1], "s", "expected a number in s"),
    ("fast", "dB", 'such as "60 dB"'),
])
def test_quantities_refused_say_what_would_do(text, unit, words):
    """A wrong unit or a non-number is a UnitError whose message says what would be right."""
    with pytest.raises(UnitError, match=words.replace("(", r"\(").replace("?", r"\?")):
        parse_quantity(text, unit)


def test_frequencies_print_for_people():
    """format_frequency picks the largest prefix and keeps the significant digits."""
    assert [format_frequency(f) for f in (156.8e6, 25e3, 0.0, 2.4e9, 12.5)] == \
        ["156.8 MHz", "25.0 kHz", "0 Hz", "2.4 GHz", "12.5 Hz"]


def test_every_kind_in_the_table_describes_and_converts():
    """Each row of KINDS names itself in words and converts a good value of its kind."""
    good = {"int": 3, "float": 2.5, "quantity": "1 kHz", "bool": True, "str": "x", "input-path": "a.cf32",
            "output-path": "b.cf32", "choice": "a", "list": [1], "channels": "all"}
    assert set(good) == set(KINDS)
    for name, value in good.items():
        param = Param("p", name, "doc", unit="Hz", choices=("a", "b"))
        assert param.describe_type()
        assert param.convert(value) is not None


@pytest.mark.parametrize("kind,value,message", [
    ("int", True, "expected a whole number, got true"),
    ("int", 2.0, "expected a whole number, got 2.0"),
    ("float", "1", 'expected a number, got "1"'),
    ("bool", 1, "expected true or false, got 1"),
    ("str", "", 'expected text as a quoted string, got ""'),
    ("choice", "c", 'expected one of "a", "b", got "c"'),
    ("list", "x", 'expected a list, got "x"'),
])
def test_wrong_values_are_refused_with_what_was_expected(kind, value, message):
    """bool is not taken for a number (it is an int subclass in Python), and every refusal says what was expected."""
    with pytest.raises(ValueError) as caught:
        Param("p", kind, "doc", choices=("a", "b")).convert(value)
    assert str(caught.value) == message


def test_bounds_and_rules():
    """minimum/maximum bound numbers, shown with the value as written; a rule replaces the generic words."""
    rate = Param("rate", "quantity", "doc", unit="Hz", minimum=1.0, maximum=1e9)
    with pytest.raises(ValueError, match=r'expected at most 1000000000, got "2 GHz"'):
        rate.convert("2 GHz")
    queue = Param("queue", "int", "doc", minimum=1, maximum=10, rule="a whole number of messages from 1 to 10")
    for bad in (0, 11, "3"):
        with pytest.raises(ValueError, match="expected a whole number of messages from 1 to 10"):
            queue.convert(bad)
    assert queue.convert(10) == 10


def test_a_plugin_with_an_unknown_parameter_kind_is_refused_at_registration():
    """The kinds a plugin may declare are the table's rows; anything else is refused by name."""
    from bandloom.blocks.block import Block
    from bandloom.runtime.plugins import PluginError

    class Odd(Block):
        type_name = "odd"
        summary = "An odd block."
        parameters = (Param("colour", "colour", "doc"),)

    with pytest.raises(PluginError, match="parameter 'colour' has unknown kind 'colour'"):
        validate_block_class("odd", Odd)


@pytest.mark.parametrize("value", [float("nan"), float("inf"), float("-inf")])
def test_non_finite_numbers_are_refused(value):
    """nan and inf (which TOML allows) are refused before any block sees them, bounds or not."""
    for param in (Param("buffer", "quantity", "doc", unit="s", minimum=1e-3, maximum=3600.0),
                  Param("gain", "float", "doc")):
        with pytest.raises(ValueError, match="expected a finite number"):
            param.convert(value)
