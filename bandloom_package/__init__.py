"""bandloom: a polyphase channelizer and synthesis block set, run as processes over ZeroMQ from TOML flows.

The code lives in two subpackages, imported in one direction: :mod:`bandloom.blocks` (kernels and block
types) and :mod:`bandloom.runtime` (flow files, processes, links). ``python -m bandloom`` is the
``bandloom`` command.
"""

__all__ = ["__version__"]


def __getattr__(name: str) -> str:
    """``__version__``, read from the installed package's metadata on first use (importlib.metadata costs
    about 40 ms to import, and every worker process imports this package)."""
    if name != "__version__":
        raise AttributeError(f"module 'bandloom' has no attribute {name!r}")
    from importlib.metadata import PackageNotFoundError, version
    try:
        value = version("bandloom")
    except PackageNotFoundError:         # run from a source tree that was never installed
        value = "0+unknown"
    globals()["__version__"] = value
    return value
