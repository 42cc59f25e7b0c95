"""A flow run as shares, one per host: how the shares find each other, start together and stop together.

Each host runs ``bandloom run FLOW --host NAME``: a supervisor for the blocks
placed on that host (its *share*). The shares talk over a channel of their
own: each one binds a PUB socket on its host's first port (``[hosts.NAME]
port``) and connects a SUB socket to every other host's, all with the flow's
CURVE keys (``[flow] keys``; one folder, a copy on every host). Twice a
second, and whenever its state changes, each share publishes a
:class:`ShareStatus`: its state, the peers it hears, and for each of its
blocks the state and the counters of the links that cross to other hosts.

* **Start.** A share's sources start only when every share of the flow is
  READY (all of its workers have opened their links) and hears every other
  one. A share that waits longer than ``--wait-for-hosts`` names the hosts
  it has not heard from, with the address it tried, and fails before any
  sample moved.
* **Keys.** A peer whose CURVE handshake fails (the keys differ) is named,
  and the share fails at once: encrypted links cannot carry samples.
* **Same flow.** Each status carries a digest of the flow file (and its
  ``--set`` overrides); a share that runs something else is named and refused.
* **Stop together.** A share that is asked to stop (Ctrl-C, SIGTERM) says
  STOPPING, and every other share stops its sources too: the streams end and
  drain across the hosts. A share that fails says ABORTING with the reason,
  and the others abort. A peer not heard for :data:`SILENCE_SECONDS` (or
  whose connection dropped and who stayed silent for a second) is lost: the
  others abort, count what they had sent it and it had not acknowledged, and
  fail.
* **End.** End of stream crosses with the samples. A share whose workers
  have all ended says FINISHED, with its outcome and its counts of lost
  samples, and waits for the others to finish (or be lost), so that every
  share's summary shows what crossed both ways and the verdict of the whole
  flow.

Samples themselves never go through this channel: a link that crosses hosts
is an endpoint (:mod:`.endpoints`) served by its source's host on a port of
its own, which the consumer's host connects to (:mod:`.endpoint_client`), so
the sender counts as delivered exactly what the far block acknowledged.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass, field, fields
from enum import Enum
from pathlib import Path
from typing import Any

import msgpack
import zmq

from .control import BlockState, InletStats, OutletStats
from .endpoint_client import HANDSHAKE_FAILED, secure_client
from .flow import Flow
from .links import recv_monitor_event, secure_server

__all__ = ["HEARTBEAT_SECONDS", "SILENCE_SECONDS", "BlockView", "Peer", "RemoteProcess", "ShareError", "ShareNetwork",
           "ShareState", "ShareStatus", "flow_digest"]

HEARTBEAT_SECONDS = 0.5       # a share says where it stands at least this often
SILENCE_SECONDS = 5.0         # a peer not heard for this long is lost
DROPPED_SECONDS = 1.0         # ... or for this long after its connection dropped
STATUS_LIMIT = 4 << 20        # bytes of one status, at most


class ShareError(ValueError):
    """A status message that is not one; the text names the host it came from and what is wrong."""


class ShareState(str, Enum):
    """Where a share stands, as its peers see it."""

    STARTING = "starting"     # its workers are starting
    READY = "ready"           # every worker of the share has opened its links
    RUNNING = "running"       # it has seen every share ready: its sources run
    STOPPING = "stopping"     # asked to stop: its sources end their streams, the flow drains
    ABORTING = "aborting"     # it failed or aborts: every share stops now (``reason`` says why)
    FINISHED = "finished"     # every worker of the share has ended; outcome and counts are final


@dataclass(frozen=True, kw_only=True)
class BlockView:
    """One block of a share as its peers see it: its state, its process, whether it is left down
    (``on_failure = "continue"``: its producers on other hosts drop and count what they would send it,
    rather than wait for ever), and the counters of its links that cross to other hosts (by link id)."""

    state: BlockState
    pid: int = 0
    left_down: bool = False
    outputs: dict[int, OutletStats] = field(default_factory=dict)
    inputs: dict[int, InletStats] = field(default_factory=dict)


@dataclass(frozen=True, kw_only=True)
class ShareStatus:
    """What a share publishes (see the module doc).

    >>> s = ShareStatus(host="a", flow_digest="d", state=ShareState.READY, heard=("b",),
    ...                 blocks={"split": BlockView(state=BlockState.RUNNING, outputs={3: OutletStats(rows=9)})})
    >>> ShareStatus.decode(s.encode(), sender="a") == s
    True
    """

    host: str
    flow_digest: str
    state: ShareState
    heard: tuple[str, ...] = ()
    reason: str = ""              # ABORTING: why
    outcome: str = ""             # FINISHED: finished, interrupted or failed
    lost_samples: int = 0         # FINISHED: what its verdict counts
    lost_samples_not_accepted: int = 0
    blocks: dict[str, BlockView] = field(default_factory=dict)

    def encode(self) -> bytes:
        values = asdict(self)
        values["state"] = self.state.value
        for view in values["blocks"].values():
            view["state"] = view["state"].value
        return msgpack.packb(values, use_bin_type=True)

    @classmethod
    def decode(cls, raw: bytes, *, sender: str) -> ShareStatus:
        """Check and unpack a status from host ``sender`` (authenticated by CURVE, still checked: limits,
        known fields only, typed)."""
        if len(raw) > STATUS_LIMIT:
            raise ShareError(f"host {sender}: a status of {len(raw)} bytes, more than {STATUS_LIMIT}")
        try:
            values = msgpack.unpackb(raw, raw=False, strict_map_key=False, max_bin_len=0, max_str_len=1 << 16,
                                     max_array_len=1 << 16, max_map_len=1 << 16)
            values["state"] = ShareState(values["state"])
            values["heard"] = tuple(str(h) for h in values["heard"])
            blocks = {}
            for name, view in values["blocks"].items():
                blocks[str(name)] = BlockView(
                    state=BlockState(view["state"]), pid=_whole(view["pid"]), left_down=view["left_down"] is True,
                    outputs={_whole(k): _counters(OutletStats, v) for k, v in view["outputs"].items()},
                    inputs={_whole(k): _counters(InletStats, v) for k, v in view["inputs"].items()})
            for key in ("lost_samples", "lost_samples_not_accepted"):
                values[key] = _whole(values.get(key, 0))
            for key in ("host", "flow_digest", "reason", "outcome"):
                if not isinstance(values.get(key, ""), str):
                    raise ValueError(f"{key} is not text")
            values["blocks"] = blocks
            status = cls(**values)
        except (TypeError, ValueError, KeyError, AttributeError, msgpack.UnpackException) as error:
            raise ShareError(f"host {sender}: a status message that is not one ({type(error).__name__}: "
                             f"{error})") from None
        if status.host != sender:
            raise ShareError(f"host {sender}: its status says it is host {status.host!r}")
        return status


def _whole(value: Any) -> int:
    """A whole number from a peer, or ValueError (True and 1.5 are not)."""
    if isinstance(value, bool) or not isinstance(value, int) or not -(1 << 62) <= value < 1 << 62:
        raise ValueError(f"{value!r} is not a whole number")
    return value


def _counters(kind: type[OutletStats] | type[InletStats], values: Any) -> Any:
    """Counters of one end of a link from a peer: only the fields ``kind`` has, each of the type its
    default has (a count, seconds, or nothing where None is allowed)."""
    if not isinstance(values, dict):
        raise ValueError("counters are not a map")
    checked: dict[str, Any] = {}
    for f in fields(kind):
        if f.name not in values:
            continue
        value, default = values[f.name], f.default
        if value is None and default is None:
            checked[f.name] = None
        elif isinstance(default, float) and isinstance(value, (int, float)) and not isinstance(value, bool):
            checked[f.name] = float(value)
        else:
            checked[f.name] = _whole(value)
    unknown = set(values) - {f.name for f in fields(kind)}
    if unknown:
        raise ValueError(f"unknown counters {sorted(unknown)[:3]}")
    return kind(**checked)


def flow_digest(path: str | Path, overrides: Sequence[str] = ()) -> str:
    """A digest of the flow file's bytes and the ``--set`` overrides: shares of one flow must agree on it."""
    digest = hashlib.sha256(Path(path).read_bytes())
    for text in overrides:
        digest.update(b"\0" + text.encode())
    return digest.hexdigest()[:16]


@dataclass
class Peer:
    """What this share knows of another host's share."""

    name: str
    endpoint: str                     # where its channel is reached
    status: ShareStatus | None = None
    last_heard: float = 0.0
    dropped_at: float | None = None   # its connection dropped then (None: up, or never made)
    key_failures: int = 0
    handshakes: int = 0
    lost: str = ""                    # why this share stopped because of it (it aborted, failed, or is gone)
    gone: bool = False                # silent, or its connection dropped: its statuses are no longer taken

    @property
    def state(self) -> ShareState | None:
        return self.status.state if self.status else None


class ShareNetwork:
    """This host's end of the shares' channel (see the module doc). Use as a context manager."""

    def __init__(self, flow: Flow, here: str, *, digest: str, context: zmq.Context) -> None:
        self.flow = flow
        self.here = here
        self.digest = digest
        me = flow.hosts[here]
        self.peers = {name: Peer(name, host.endpoint(host.port, bind=False))
                      for name, host in flow.hosts.items() if name != here}
        self.by_endpoint = {peer.endpoint: peer for peer in self.peers.values()}
        self.refused_here = 0           # handshakes on our own socket that failed (a peer with other keys)
        self.problems: list[str] = []   # statuses that were not (ShareError), first few
        self.last_published = 0.0
        self.last_state: ShareState | None = None
        self.context = context
        self.pub = context.socket(zmq.PUB)
        self.sub = context.socket(zmq.SUB)
        self.authenticator = None
        for sock in (self.pub, self.sub):
            sock.setsockopt(zmq.LINGER, 0)
            sock.setsockopt(zmq.IPV6, 1)
            sock.setsockopt(zmq.MAXMSGSIZE, STATUS_LIMIT + 1024)
        self.sub.setsockopt(zmq.SUBSCRIBE, b"")
        if flow.host_keys:
            self.authenticator = secure_server(self.pub, flow.host_keys, context)
            secure_client(self.sub, flow.host_keys)
        events = HANDSHAKE_FAILED | zmq.EVENT_HANDSHAKE_SUCCEEDED | zmq.EVENT_DISCONNECTED
        self.pub_monitor = self.pub.get_monitor_socket(HANDSHAKE_FAILED)
        self.sub_monitor = self.sub.get_monitor_socket(events)
        self.address = me.endpoint(me.port, bind=True)
        try:
            self.pub.bind(self.address)
        except zmq.ZMQError as error:
            self.close()
            raise OSError(f"host {here}: cannot listen on {self.address} for the other hosts: "
                          f"{zmq.strerror(error.errno or 0)} (is another share of host {here} running here, or "
                          f"is listen = {me.listen!r} an address of this machine?)") from None
        for peer in self.peers.values():
            self.sub.connect(peer.endpoint)

    def __enter__(self) -> ShareNetwork:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        for sock, monitor in ((self.pub, self.pub_monitor), (self.sub, self.sub_monitor)):
            try:
                sock.disable_monitor()
            except zmq.ZMQError:
                pass
            monitor.close(linger=0)
            sock.close(linger=0)
        if self.authenticator is not None:
            self.authenticator.stop()
            self.authenticator = None

    # -- talking -------------------------------------------------------------------------------
    def publish(self, status: ShareStatus, now: float) -> None:
        """Say ``status`` now if the state changed, else every HEARTBEAT_SECONDS."""
        if status.state is not self.last_state or now - self.last_published >= HEARTBEAT_SECONDS:
            self.pub.send(status.encode())
            self.last_published, self.last_state = now, status.state

    def read(self, now: float) -> None:
        """Take every status and connection event that has arrived."""
        while self.sub_monitor.poll(0):
            event = recv_monitor_event(self.sub_monitor)
            peer = self.by_endpoint.get(event["endpoint"].decode(errors="replace"))
            if peer is None:
                continue
            if event["event"] == zmq.EVENT_HANDSHAKE_SUCCEEDED:
                peer.handshakes += 1
                peer.dropped_at = None
            elif event["event"] & HANDSHAKE_FAILED:
                peer.key_failures += 1
            elif event["event"] == zmq.EVENT_DISCONNECTED and peer.status is not None:
                peer.dropped_at = peer.dropped_at or now
        while self.pub_monitor.poll(0):
            recv_monitor_event(self.pub_monitor)
            self.refused_here += 1
        while True:
            try:
                raw = self.sub.recv(zmq.NOBLOCK)
            except zmq.Again:
                break
            try:
                status = self._decode(raw)
            except ShareError as error:
                if len(self.problems) < 5:
                    self.problems.append(str(error))
                continue
            peer = self.peers[status.host]
            if peer.gone:
                continue
            peer.status, peer.last_heard, peer.dropped_at = status, now, None

    def _decode(self, raw: bytes) -> ShareStatus:
        try:
            host = msgpack.unpackb(raw, raw=False, strict_map_key=False, max_bin_len=0, max_str_len=1 << 16,
                                   max_array_len=1 << 16, max_map_len=1 << 16).get("host")
        except Exception as error:                 # msgpack raises several kinds for bad bytes
            raise ShareError(f"a status message that is not msgpack ({type(error).__name__})") from None
        if host not in self.peers:
            raise ShareError(f"a status from {host!r}, which is not another host of this flow")
        status = ShareStatus.decode(raw, sender=host)
        if status.flow_digest != self.digest:
            raise ShareError(f"host {host} runs another version of the flow file or other --set values (digest "
                             f"{status.flow_digest}, here {self.digest}); every host must run the same file")
        return status

    # -- what it means --------------------------------------------------------------------------
    def missing(self) -> list[Peer]:
        """Peers not heard from yet."""
        return [p for p in self.peers.values() if p.status is None]

    def all_ready(self) -> bool:
        """Every peer has all its workers up and hears every other share, this one included."""
        everyone = set(self.flow.hosts)
        return all(p.status is not None and p.state is not ShareState.STARTING
                   and set(p.status.heard) | {p.name} >= everyone for p in self.peers.values())

    def stopping(self) -> list[Peer]:
        return [p for p in self.peers.values() if p.state is ShareState.STOPPING]

    def trouble(self, now: float) -> str | None:
        """Why this share must abort now, or None: keys that do not match, another flow, a peer that is
        aborting, or a peer lost (see the module doc)."""
        for peer in self.peers.values():
            if peer.key_failures >= 2 and not peer.handshakes:
                return (f"host {peer.name} ({peer.endpoint}) refused this host's keys ({peer.key_failures} CURVE "
                        f"handshakes failed): every host needs a copy of the same key folder ([flow] keys)")
        if self.refused_here >= 2 and self.missing():
            names = ", ".join(p.name for p in self.missing())
            return (f"{self.refused_here} connections to this host ({self.address}) failed the key check; the hosts "
                    f"not heard from ({names}) hold other keys than [flow] keys here")
        for problem in self.problems:
            if "another version of the flow" in problem:
                return problem
        for peer in self.peers.values():
            if peer.state is ShareState.ABORTING and not peer.lost:
                peer.lost = f"host {peer.name} aborted: {peer.status.reason if peer.status else ''}"
                return peer.lost
            if peer.state is ShareState.FINISHED and peer.status and peer.status.outcome == "failed" and not peer.lost:
                peer.lost = f"host {peer.name} failed"
                return peer.lost
            if peer.status is None or peer.gone or peer.state is ShareState.FINISHED:
                continue
            silent = now - peer.last_heard
            if silent > SILENCE_SECONDS or (peer.dropped_at is not None and now - peer.dropped_at > DROPPED_SECONDS):
                how = "its connection dropped" if peer.dropped_at is not None else "it fell silent"
                peer.gone = True
                peer.lost = (f"host {peer.name} ({peer.endpoint}) was lost: {how}, last heard {silent:.1f} s ago "
                             f"(state {peer.state.value if peer.state else '?'})")
                return peer.lost
        return None

    def waiting_message(self, waited: float) -> str:
        """Why the start is taking long: who is missing or not ready, and where they were looked for."""
        missing = self.missing()
        if missing:
            who = "; ".join(f"{p.name} at {p.endpoint}" for p in missing)
            heard_wrong = f" (messages that were not statuses: {'; '.join(self.problems)})" if self.problems else ""
            return (f"waited {waited:.0f} s for the other hosts; not heard from: {who}. Start 'bandloom run "
                    f"{self.flow.path.name} --host NAME' there, and check the address and that its firewall lets "
                    f"TCP in on its ports{heard_wrong}")
        slow = [p.name for p in self.peers.values() if p.state is ShareState.STARTING]
        return f"waited {waited:.0f} s for the other hosts; still starting their blocks: {', '.join(slow) or '-'}"

    def settled(self, now: float) -> bool:
        """Every peer has finished, or is lost (the end of this share's wait after its own finish)."""
        self.trouble(now)
        return all(p.state is ShareState.FINISHED or p.gone or p.status is None for p in self.peers.values())

    def gone(self) -> set[str]:
        """Hosts whose shares are gone (silent, or their connections dropped)."""
        return {p.name for p in self.peers.values() if p.gone}

    def left_down(self) -> list[str]:
        """Blocks of other hosts that their shares have left down."""
        return [name for name, (_, view) in self.views().items() if view.left_down]

    def views(self) -> Mapping[str, tuple[str, BlockView]]:
        """Every remote block heard of: name -> (host, its view)."""
        return {name: (peer.name, view) for peer in self.peers.values() if peer.status
                for name, view in peer.status.blocks.items()}

    def report(self) -> dict[str, Any]:
        """Each peer as the summary shows it."""
        out = {}
        for peer in self.peers.values():
            s = peer.status
            out[peer.name] = {"state": s.state.value if s else "never heard", "outcome": s.outcome if s else "",
                              "lost": peer.lost, "lost_samples": s.lost_samples if s else 0,
                              "lost_samples_not_accepted": s.lost_samples_not_accepted if s else 0}
        return out


class RemoteProcess:
    """A block's process on another host, seen as the supervisor sees a local one (it never polls it:
    the block's state comes from its share's statuses)."""

    def __init__(self, pid: int) -> None:
        self.pid = pid
        self.returncode: int | None = None

    def poll(self) -> int | None:
        return self.returncode

    def wait(self, timeout: float | None = None) -> int | None:
        return self.returncode

    def kill(self) -> None:
        raise ProcessLookupError(f"process {self.pid} runs on another host; its own share stops it")
