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
from typing import TextIO

from bandloom import __version__

from . import bench_command, design_command, flow_commands, verify_commands
from .terminal import progress

__all__ = ["UsageError", "build_parser", "entry_point", "main"]

Runner = Callable[[argparse.Namespace, TextIO], int]
Adder = Callable[[argparse.ArgumentParser], None]


class UsageError(Exception):
    """A problem with what the user asked for; printed as one line, exit status 2."""


def _run_bench(args: argparse.Namespace, out: TextIO) -> int:
    try:
        return bench_command.run(args, out, progress=progress)
    finally:
        progress("")


#: name -> (adds its arguments, runs it, one line of help)
COMMANDS: dict[str, tuple[Adder, Runner, str]] = {
    "run": (flow_commands.add_run_arguments, flow_commands.run_run, "run a flow file: one process per block"),
    "check": (flow_commands.add_check_arguments, flow_commands.run_check,
              "check a flow file without running it; report every problem"),
    "blocks": (flow_commands.add_blocks_arguments, flow_commands.run_blocks,
               "list block types, or show one type's parameters and ports"),
    "design": (design_command.add_arguments, design_command.run,
               "design a matched analysis/synthesis bank and print its figures"),
    "roundtrip": (verify_commands.add_roundtrip_arguments, verify_commands.run_roundtrip,
                  "run test signals through analysis and synthesis and report the reconstruction"),
    "channel-quality": (verify_commands.add_quality_arguments, verify_commands.run_quality,
                        "measure a channelizer's channels with tones and compare with its taps' figures"),
    "bench": (bench_command.add_arguments, _run_bench, "measure bank throughput against a bare FFT in the same run"),
    "keys": (flow_commands.add_keys_arguments, flow_commands.run_keys,
             "make CURVE key pairs for a link that crosses machines"),
}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="bandloom", description="Polyphase channelizer and synthesis "
                                     "blocks run as processes over ZeroMQ.")
    parser.add_argument("--version", action="version", version=f"bandloom {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for name, (add_arguments, run, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        add_arguments(p)
        p.set_defaults(func=run)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        status = args.func(args, sys.stdout)
        sys.stdout.flush()
        return status
    except flow_commands.Interrupted as stop:
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
    except flow_commands.Interrupted as stop:      # SIGTERM: end killed by it too (shell status 143)
        signal.signal(stop.signum, signal.SIG_DFL)
        os.kill(os.getpid(), stop.signum)
        return 128 + stop.signum
