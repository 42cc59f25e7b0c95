"""bandloom: a polyphase channelizer and synthesis block set, run as processes over ZeroMQ from TOML flows.

The code lives in two subpackages, imported in one direction: :mod:`bandloom.blocks` (kernels and block
types) and :mod:`bandloom.runtime` (flow files, processes, links). ``python -m bandloom`` is the
``bandloom`` command.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("bandloom")
except PackageNotFoundError:         # run from a source tree that was never installed
    __version__ = "0+unknown"

__all__ = ["__version__"]
