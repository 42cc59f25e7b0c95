"""The one error type of the numeric kernels.

A kernel that refuses an argument raises :class:`ParameterError`, a
``ValueError`` that also carries the name of the parameter at fault, so that
a caller (a block, a command) can point at its own setting of that name
without reading the message text.
"""

from __future__ import annotations

__all__ = ["ParameterError"]


class ParameterError(ValueError):
    """A kernel argument broke a rule; ``param`` names it, the message states the rule.

    >>> error = ParameterError("Parameter hop=0 is not an integer >= 1!", param="hop")
    >>> error.param, isinstance(error, ValueError)
    ('hop', True)
    """

    def __init__(self, message: str, *, param: str) -> None:
        super().__init__(message)
        self.param = param
