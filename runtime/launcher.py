"""Starting worker processes fast: one pre-imported process that forks them.

A fresh interpreter for each block costs about half a second of CPU before
the block does anything (Python, numpy, ZeroMQ and bandloom's imports, numba
loading its cached kernels); a flow of 66 blocks on two cores took 14 to 23 s
to start that way. Instead, the supervisor starts one *launcher* process
(``python -m bandloom.runtime.launcher FD``) as the run begins, while the flow
is still being checked. The launcher imports what every worker needs, then
the block types of the flow and whatever each declares with
:meth:`~bandloom.blocks.block.Block.preload` (the banks' compiled kernels),
and forks one child per worker asked for. A child has the launcher's
imports already, shares its memory pages until it writes them, and runs
:func:`.worker.main` exactly as a worker started on its own would.

The protocol, one line of text each way over a socket pair the supervisor
made (the launcher's end is file descriptor ``FD``):

* ``preload TYPE ...`` -- import these block types and warm them; answered ``ready``.
* ``start SPEC STDIN STDOUT [RINGS]`` -- fork a worker for the spec file ``SPEC``
  (first making the shared-memory ring of each of its links that has none
  yet, so that both ends inherit it: :mod:`.shared_rings`; ``RINGS`` is
  ``LINK:BYTES`` pairs joined by commas);
  ``STDIN`` is ``keep`` (the block reads the run's standard input) or
  ``null``; ``STDOUT`` is ``keep`` (the block writes data to it) or ``log``
  (standard error). Answered ``pid PID``.
* unprompted, ``exit PID CODE`` when a child ends (CODE as
  :attr:`subprocess.Popen.returncode`: negative for a signal).

The launcher ignores Ctrl-C and SIGTERM (the supervisor coordinates the
stop, as for workers). When the supervisor's end closes -- the run is over,
or the supervisor died -- the launcher exits at once; a worker still running
then has a new parent, sees it, and aborts (see :mod:`.worker`).

:class:`Launcher` is the supervisor's side; :class:`LaunchedProcess` is the
part of :class:`subprocess.Popen` the supervisor uses (``pid``, ``poll``,
``wait``, ``kill``, ``returncode``) for a process the launcher forked.
"""

from __future__ import annotations

import os
import selectors
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Mapping
from pathlib import Path
from types import TracebackType

__all__ = ["EXIT_UNKNOWN", "LaunchError", "LaunchedProcess", "Launcher", "main", "start_early", "take_launcher"]

EXIT_UNKNOWN = 255            # the return code of a worker whose launcher died before it could say how it ended
REPLY_SECONDS = 60.0          # the longest a preload (imports, kernels) or a fork may take to answer


class LaunchError(ChildProcessError):
    """The launcher could not start a worker, or is gone; the message says which and why."""


def _running(pid: int) -> bool:
    """Whether process ``pid`` exists and is not a zombie (an orphan whose new parent has not reaped it)."""
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    except IndexError:
        return True
    return state != "Z"


class LaunchedProcess:
    """A worker forked by the launcher, seen as the supervisor sees a :class:`subprocess.Popen`."""

    def __init__(self, launcher: Launcher, pid: int) -> None:
        self.launcher = launcher
        self.pid = pid
        self.returncode: int | None = None

    def poll(self) -> int | None:
        if self.returncode is None:
            self.launcher.read_notices()
        return self.returncode

    def wait(self, timeout: float | None = None) -> int:
        deadline = None if timeout is None else time.monotonic() + timeout
        while self.poll() is None:
            if deadline is not None and time.monotonic() > deadline:
                raise subprocess.TimeoutExpired(f"worker {self.pid}", timeout or 0.0)
            self.launcher.read_notices(wait=0.02)
        assert self.returncode is not None
        return self.returncode

    def kill(self) -> None:
        if self.poll() is None:            # not known to have ended (its PID is not yet free for reuse)
            try:
                os.kill(self.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass


class Launcher:
    """The supervisor's end of the launcher process (see the module doc); a context manager.

    ``flow_hint`` is the flow file the run is about, if known: the launcher reads the block types it names
    (no more than that: nothing is checked there) and preloads them at once, before it is asked to."""

    def __init__(self, flow_hint: str | None = None) -> None:
        ours, theirs = socket.socketpair()
        self.sock = ours
        hint = [flow_hint] if flow_hint and not any(c.isspace() for c in flow_hint) else []
        self.process = subprocess.Popen([sys.executable, "-m", "bandloom.runtime.launcher", str(theirs.fileno()),
                                         *hint], pass_fds=(theirs.fileno(),), stdin=None, stdout=None)
        theirs.close()
        self.buffer = b""
        self.children: dict[int, LaunchedProcess] = {}
        self.replies: list[str] = []

    def __enter__(self) -> Launcher:
        return self

    def __exit__(self, kind: type[BaseException] | None, error: BaseException | None,
                 trace: TracebackType | None) -> None:
        self.close()

    def close(self) -> None:
        """Close our end: the launcher exits (its children, if any are left, notice and abort)."""
        self.sock.close()
        try:
            self.process.wait(timeout=5)
        except subprocess.TimeoutExpired:
            self.process.kill()
            self.process.wait()

    def _say(self, line: str) -> None:
        try:
            self.sock.sendall(line.encode() + b"\n")
        except OSError as error:
            raise LaunchError(f"the worker launcher is gone ({self._ended()}): {error.strerror}") from None

    def _ended(self) -> str:
        code = self.process.poll()
        return "still running" if code is None else f"exit status {code}"

    def _lines(self, wait: float) -> list[str]:
        """Lines the launcher has sent, waiting up to ``wait`` seconds for the first."""
        self.sock.settimeout(wait)
        try:
            data = self.sock.recv(65536)
        except (BlockingIOError, TimeoutError):
            return []
        except OSError:
            data = b""
        if not data:
            raise LaunchError(f"the worker launcher is gone ({self._ended()})")
        self.buffer += data
        *lines, self.buffer = self.buffer.split(b"\n")
        return [line.decode() for line in lines]

    def read_notices(self, wait: float = 0.0) -> None:
        """Take what the launcher said: children that ended get their return codes; replies are kept. If
        the launcher itself is gone, nobody will say how its children end: each one that no longer exists
        gets :data:`EXIT_UNKNOWN`."""
        try:
            lines = self._lines(wait)
        except LaunchError:
            lines = []
            for pid, orphan in list(self.children.items()):
                if not _running(pid):
                    orphan.returncode = EXIT_UNKNOWN
                    del self.children[pid]
        for line in lines:
            word, _, rest = line.partition(" ")
            if word == "exit":
                pid, code = (int(v) for v in rest.split())
                ended = self.children.pop(pid, None)
                if ended is not None:
                    ended.returncode = code
            else:
                self.replies.append(line)

    def _reply(self, what: str) -> str:
        deadline = time.monotonic() + REPLY_SECONDS
        while not self.replies:
            if time.monotonic() > deadline:
                raise LaunchError(f"the worker launcher did not answer {what!r} within {REPLY_SECONDS:g} s")
            self.read_notices(wait=0.05)
            if not self.replies and self.process.poll() is not None:
                raise LaunchError(f"the worker launcher is gone ({self._ended()}) before answering {what!r}")
        return self.replies.pop(0)

    def preload(self, type_names: list[str]) -> None:
        """Have the launcher import and warm these block types before it forks workers of them."""
        self._say("preload " + " ".join(type_names))
        reply = self._reply("preload")
        if reply != "ready":
            raise LaunchError(f"the worker launcher could not preload {type_names}: {reply}")

    def start(self, spec_path: str, *, keep_stdin: bool, keep_stdout: bool,
              rings: Mapping[int, int] | None = None) -> LaunchedProcess:
        """Fork a worker for the spec file; its standard input and output as the block needs them; ``rings``
        are its links' shared-memory rings (link id: bytes), made first where the far end has not made them."""
        if any(c.isspace() for c in spec_path):
            raise LaunchError(f"spec path {spec_path!r} has white space in it")
        ring_list = ",".join(f"{int(link)}:{int(size)}" for link, size in sorted((rings or {}).items()))
        self._say(f"start {spec_path} {'keep' if keep_stdin else 'null'} {'keep' if keep_stdout else 'log'} "
                  f"{ring_list}".rstrip())
        reply = self._reply("start")
        word, _, rest = reply.partition(" ")
        if word != "pid":
            raise LaunchError(f"the worker launcher could not start a worker: {reply}")
        child = self.children[int(rest)] = LaunchedProcess(self, int(rest))
        return child


_EARLY: list[Launcher] = []


def start_early(flow_hint: str | None) -> None:
    """Start this command's launcher now, before the command's own imports (``bandloom run``)."""
    if not _EARLY:
        _EARLY.append(Launcher(flow_hint))


def take_launcher(flow_hint: str | None = None) -> Launcher:
    """The launcher started early for this command, or a new one."""
    return _EARLY.pop() if _EARLY else Launcher(flow_hint)


# -- the launcher process ---------------------------------------------------------------------------
def _types_in(flow_hint: str) -> list[str]:
    """The block types a flow file names (read as TOML; anything unreadable gives none)."""
    import tomllib
    if not os.path.isfile(flow_hint):      # a pipe or a device could block the launcher
        return []
    try:
        with open(flow_hint, "rb") as handle:
            blocks = tomllib.loads(handle.read(1 << 20).decode()).get("blocks", {})
    except (OSError, ValueError, UnicodeDecodeError):
        return []
    if not isinstance(blocks, dict):
        return []
    return sorted({b["type"] for b in blocks.values() if isinstance(b, dict) and isinstance(b.get("type"), str)})


def _preload(type_names: list[str], *, quietly: bool = False) -> str:
    from .plugins import load_registry

    registry = load_registry(only=type_names)
    for name in type_names:
        cls = registry.types.get(name)
        if cls is None:
            if quietly:
                continue
            return f"block type {name!r} is not installed here"
        cls.preload()
    return "ready"


def _make_rings(rings: str) -> None:
    """The shared-memory rings a ``start`` line lists (``LINK:BYTES,...``) that are not made yet (see
    :mod:`.shared_rings`): made before the worker is forked, so that it and the far end inherit them."""
    from .shared_rings import MAX_RING_BYTES, make_ring
    for pair in filter(None, rings.split(",")):
        link, _, size = pair.partition(":")
        if link.isdigit() and size.isdigit() and 0 < int(size) <= MAX_RING_BYTES:
            make_ring(int(link), int(size))


def _child(spec_path: str, stdin: str, stdout: str, launcher_fd: int) -> None:
    """In the forked child: standard streams as the block needs them, then the worker; never returns."""
    code = 1
    try:
        os.close(launcher_fd)
        signal.signal(signal.SIGCHLD, signal.SIG_DFL)
        if stdin != "keep":
            null = os.open(os.devnull, os.O_RDONLY)
            os.dup2(null, 0)
            os.close(null)
        if stdout != "keep":
            os.dup2(2, 1)
        from .worker import main as worker_main
        code = worker_main([spec_path])
    except BaseException as error:  # anything at all: the child must never return into the launcher
        print(f"bandloom: worker for {spec_path} failed to start: {type(error).__name__}: {error}", file=sys.stderr)
    finally:
        try:
            sys.stdout.flush()
            sys.stderr.flush()
        finally:
            os._exit(code)


def main(argv: list[str] | None = None) -> int:
    """``python -m bandloom.runtime.launcher FD``: serve the supervisor on the socket ``FD`` until it closes."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    args = sys.argv[1:] if argv is None else argv
    fd = int(args[0])
    sock = socket.socket(fileno=fd)
    # What every worker needs, imported once here (the flow's own block types come with 'preload').
    from . import worker  # noqa: F401
    from ._memory import reuse_chunk_buffers
    reuse_chunk_buffers()
    if len(args) > 1:                      # the flow's own block types, before the supervisor asks
        try:
            _preload(_types_in(args[1]), quietly=True)
        except Exception:  # a guess only: the supervisor's own preload reports any real failure
            pass
    selector = selectors.DefaultSelector()
    selector.register(sock, selectors.EVENT_READ)
    buffer = b""
    children: set[int] = set()
    while True:
        ready = selector.select(timeout=0.02 if children else 0.5)
        out: list[str] = []
        while children:
            try:
                pid, status = os.waitpid(-1, os.WNOHANG)
            except ChildProcessError:
                break
            if pid == 0:
                break
            children.discard(pid)
            out.append(f"exit {pid} {os.waitstatus_to_exitcode(status)}")
        if ready:
            data = sock.recv(65536)
            if not data:
                return 0                 # the supervisor is done, or gone
            buffer += data
            *lines, buffer = buffer.split(b"\n")
            for raw in lines:
                word, *rest = raw.decode().split()
                if word == "preload":
                    try:
                        out.append(_preload(rest))
                    except Exception as error:
                        out.append(f"{type(error).__name__}: {error}")
                elif word == "start" and len(rest) in (3, 4):
                    _make_rings(rest[3] if len(rest) == 4 else "")
                    sys.stdout.flush()
                    sys.stderr.flush()
                    pid = os.fork()
                    if pid == 0:
                        _child(rest[0], rest[1], rest[2], fd)
                    children.add(pid)
                    out.append(f"pid {pid}")
                else:
                    out.append(f"unknown request {raw[:80]!r}")
        if out:
            sock.sendall("".join(line + "\n" for line in out).encode())


if __name__ == "__main__":
    sys.exit(main())
