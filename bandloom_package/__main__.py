"""``python -m bandloom``: the ``bandloom`` command."""

import sys

from bandloom.runtime.cli import entry_point

sys.exit(entry_point())
