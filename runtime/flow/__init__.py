"""Flow files: read, check (every problem at once) and expand into block processes and links.

The format is specified in docs/flow-files.md. One concept a module:

* :mod:`.problems` — a problem's place and wording (key paths, "did you mean", TOML syntax errors);
* :mod:`.locator` — the line of a key path in the file's text;
* :mod:`.declarations` — the ``[flow]``, ``[blocks.NAME]`` and ``[[links]]`` tables, each on its own,
  with the link options declared like block parameters;
* :mod:`.selection` — the channel-selection language;
* :mod:`.graph` — producers before consumers (graphlib);
* :mod:`.expansion` — each input's producer, per-channel copies, output streams, links;
* :mod:`.model` — the result: :class:`Flow`, :class:`Instance`, :class:`Link`;
* :mod:`.loading` — :func:`load_flow` (a file) and :func:`check_flow` (a mapping made in code).
"""

from typing import TYPE_CHECKING, Any

from .model import FailurePolicy, Flow, Instance, Link, LinkOptions, OnFailure, WhenFull, process_groups
from .problems import FlowErrors, Problem, format_key_path

if TYPE_CHECKING:
    from .loading import check_flow, load_flow


def __getattr__(name: str) -> Any:
    """``load_flow`` and ``check_flow``, imported on first use: a worker process needs only the model (its
    link specs name a :class:`WhenFull`), not the reading and checking of flow files (about 50 ms)."""
    if name in ("check_flow", "load_flow"):
        from . import loading
        return getattr(loading, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")

__all__ = ["FailurePolicy", "Flow", "FlowErrors", "Instance", "Link", "LinkOptions", "OnFailure", "Problem", "WhenFull",
           "check_flow", "format_key_path", "load_flow", "process_groups"]
