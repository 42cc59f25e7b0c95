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

from types import SimpleNamespace

from . import bench_command, design_command, flow_commands, verify_commands

COMMANDS = {
    "run": (SimpleNamespace(add_arguments=flow_commands.add_run_arguments, run=flow_commands.run_run),
            "run a flow file: one process per block"),
    "check": (SimpleNamespace(add_arguments=flow_commands.add_check_arguments, run=flow_commands.run_check),
              "check a flow file without running it; report every problem"),
    "blocks": (SimpleNamespace(add_arguments=flow_commands.add_blocks_arguments, run=flow_commands.run_blocks),
               "list block types, or show one type's parameters and ports"),
    "design": (design_command, "design a matched analysis/synthesis bank and print its figures"),
    "roundtrip": (SimpleNamespace(add_arguments=verify_commands.add_roundtrip_arguments,
                                  run=verify_commands.run_roundtrip),
                  "run test signals through analysis and synthesis and report the reconstruction"),
    "channel-quality": (SimpleNamespace(add_arguments=verify_commands.add_quality_arguments,
                                        run=verify_commands.run_quality),
                        "measure a channelizer's channels with tones and compare with its taps' figures"),
    "bench": (bench_command, "measure bank throughput against a bare FFT in the same run"),
    "keys": (SimpleNamespace(add_arguments=flow_commands.add_keys_arguments, run=flow_commands.run_keys),
             "make CURVE key pairs for a link that crosses machines"),
}


class UsageError(Exception):
    """A problem with what the user asked for; printed as one line, exit status 2."""


def build_parser():
    parser = argparse.ArgumentParser(prog="bandloom", description="Polyphase channelizer and synthesis "
                                     "blocks run as processes over ZeroMQ.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for name, (module, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        module.add_arguments(p)
    return parser


def _progress(message):
    if sys.stderr.isatty():
        sys.stderr.write(f"\r\x1b[K{message}")
        sys.stderr.flush()


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    module, _ = COMMANDS[args.command]
    try:
        if module is bench_command:
            status = module.run(args, sys.stdout, progress=_progress)
            if sys.stderr.isatty():
                sys.stderr.write("\r\x1b[K")
        else:
            status = module.run(args, sys.stdout)
        sys.stdout.flush()
        return status
    except flow_commands.Interrupted:
        raise KeyboardInterrupt from None
    except (ValueError, UsageError, OSError) as error:
        if isinstance(error, BrokenPipeError):
            raise
        if isinstance(error, OSError) and error.filename:
            error = f"{error.filename}: {error.strerror}"
        print(f"bandloom {args.command}: error: {error}", file=sys.stderr)
        return 2


def entry_point():
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
