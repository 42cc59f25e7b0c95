"""The ``bandloom`` command line: ``main(argv=None) -> int``.

Data goes to stdout; logs, progress and errors to stderr. Errors in what the
user gave are one line naming what was wrong and exit with status 2; a
closed stdout pipe is quiet; Ctrl-C exits the way Python does for an
uncaught KeyboardInterrupt.
"""

from __future__ import annotations

import argparse
import os
import signal
import sys
from collections.abc import Callable
from importlib import import_module
from typing import TextIO

from .terminal import progress

__all__ = ["COMMANDS", "Interrupted", "UsageError", "build_parser", "entry_point", "main"]

Runner = Callable[[argparse.Namespace, TextIO], int]
Adder = Callable[[argparse.ArgumentParser], None]


class UsageError(Exception):
    """A problem with what the user asked for; printed as one line, exit status 2."""


class Interrupted(Exception):
    """The run was stopped by ``signum`` (Ctrl-C's SIGINT, or SIGTERM) after a clean shutdown; the command
    then ends killed by that same signal, as a Unix program should."""

    def __init__(self, signum: int = signal.SIGINT) -> None:
        super().__init__(signal.Signals(signum).name)
        self.signum = signum


def _run_bench(args: argparse.Namespace, out: TextIO) -> int:
    from . import bench_command
    try:
        return bench_command.run(args, out, progress=progress)
    finally:
        progress("")


#: name -> (module in this package, its function that adds the arguments, the one that runs the command,
#: one line of help). Modules are imported when their command is asked for, so that one command does not
#: pay for the others' imports.
COMMANDS: dict[str, tuple[str, str, str, str]] = {
    "run": ("flow_commands", "add_run_arguments", "run_run", "run a flow file: one process per block"),
    "check": ("flow_commands", "add_check_arguments", "run_check",
              "check a flow file without running it; report every problem"),
    "blocks": ("flow_commands", "add_blocks_arguments", "run_blocks",
               "list block types, or show one type's parameters and ports"),
    "design": ("design_command", "add_arguments", "run",
               "design a matched analysis/synthesis bank and print its figures"),
    "roundtrip": ("verify_commands", "add_roundtrip_arguments", "run_roundtrip",
                  "run test signals through analysis and synthesis and report the reconstruction"),
    "channel-quality": ("verify_commands", "add_quality_arguments", "run_quality",
                        "measure a channelizer's channels with tones and compare with its taps' figures"),
    "bench": ("bench_command", "add_arguments", "_run_bench",
              "measure bank throughput against a bare FFT in the same run (or a whole flow with --flow)"),
    "keys": ("flow_commands", "add_keys_arguments", "run_keys",
             "make CURVE key pairs for a link that crosses machines"),
}


def _command(name: str) -> tuple[Adder, Runner]:
    module_name, add, run, _ = COMMANDS[name]
    module = import_module(f".{module_name}", __package__)
    runner = _run_bench if run == "_run_bench" else getattr(module, run)
    return getattr(module, add), runner


class _ShowVersion(argparse.Action):
    """``--version``: print ``bandloom VERSION`` and exit; the version is looked up only then."""

    def __init__(self, option_strings: list[str], dest: str = argparse.SUPPRESS, **kwargs: object) -> None:
        super().__init__(option_strings, dest, nargs=0, default=argparse.SUPPRESS,
                         help="show the version and exit")

    def __call__(self, parser: argparse.ArgumentParser, namespace: argparse.Namespace, values: object,
                 option_string: str | None = None) -> None:
        import bandloom
        print(f"bandloom {bandloom.__version__}")
        parser.exit()


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The whole command line; with ``only``, other commands are listed but their arguments not loaded."""
    parser = argparse.ArgumentParser(prog="bandloom", description="Polyphase channelizer and synthesis "
                                     "blocks run as processes over ZeroMQ.")
    parser.add_argument("--version", action=_ShowVersion)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for name, (_, _, _, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        if only is None or name == only:
            add_arguments, run = _command(name)
            add_arguments(p)
            p.set_defaults(func=run)
    return parser


def main(argv: list[str] | None = None) -> int:
    words = sys.argv[1:] if argv is None else list(argv)
    asked = words[0] if words and words[0] in COMMANDS else None
    if asked == "run" and not {"-h", "--help"} & set(words):
        # Start the worker launcher before anything else is imported: it imports and preloads the flow's
        # block types while this process reads and checks the flow (runtime/launcher.py).
        from .launcher import start_early
        start_early(next((w for w in words[1:] if not w.startswith("-")), None))
    parser = build_parser(only=asked)
    args = parser.parse_args(words)
    try:
        status = args.func(args, sys.stdout)
        sys.stdout.flush()
        return status
    except Interrupted as stop:
        if stop.signum == signal.SIGINT:
            raise KeyboardInterrupt from None
        raise
    except (ValueError, UsageError, OSError) as error:
        if isinstance(error, BrokenPipeError):
            raise
        text = f"{error.filename}: {error.strerror}" if isinstance(error, OSError) and error.filename else str(error)
        print(f"bandloom {args.command}: error: {text}", file=sys.stderr)
        return 2


def entry_point() -> int:
    """Console-script wrapper: quiet on a closed pipe, Python's exit on Ctrl-C."""
    try:
        return main()
    except BrokenPipeError:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 1
    except KeyboardInterrupt:
        signal.signal(signal.SIGINT, signal.SIG_DFL)
        os.kill(os.getpid(), signal.SIGINT)
        return 130
    except Interrupted as stop:      # SIGTERM: end killed by it too (shell status 143)
        signal.signal(stop.signum, signal.SIG_DFL)
        os.kill(os.getpid(), stop.signum)
        return 128 + stop.signum
