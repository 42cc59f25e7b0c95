"""A flow placed on three hosts, each running its own share, over separate network stacks.

The "hosts" are Linux network namespaces made here with iproute2 (``ip netns``), joined by veth pairs to a
bridge in a fourth namespace: three network stacks with their own addresses (10.213.N.1..3), as three
machines on one switch would be. Each share is a real ``bandloom run FLOW --host NAME`` process started
inside its namespace. Where namespaces cannot be made (not root, no iproute2), the same tests run over
127.0.0.x addresses, and the reason is given as a warning in pytest's summary.

What is checked against what (the references): a share's outputs against the same flow file run on one
machine (``--one-machine``), sample for sample; the accounting identities of docs/reliability.md on every
link (sent = received + in flight; a link between hosts counts what its far end acknowledged).
"""

import json
import os
import shutil
import signal
import subprocess
import sys
import time
import uuid
import warnings
from pathlib import Path

import pytest
from runner import bandloom, descendants, worker_processes

FLOW = """
[flow]
name = "three hosts"
keys = "keys"

[hosts.antenna]
address = "{antenna}"
[hosts.left]
address = "{left}"
[hosts.right]
address = "{right}"

[blocks.band]
type = "scenario"
host = "antenna"
sample_rate = "1.6 MHz"
centre_frequency = "433.0 MHz"
duration = "{duration}"
noise = "-70 dBFS"
seed = 11
transmitters = [
  {{ kind = "cw", frequency = "433.300 MHz", level = "-30 dBFS" }},
  {{ kind = "am", frequency = "432.700 MHz", level = "-35 dBFS" }},
]

[blocks.split]
type = "channelizer"
host = "antenna"
channels = 16

[blocks.wide]
type = "iq-writer"
host = "antenna"
path = "wide.cf32"

[blocks.low]
type = "iq-writer"
host = "left"
path = "channel-{{channel:02d}}.cf32"
per_channel = {{ from = "split.channels", select = "0..3" }}

[blocks.high]
type = "iq-writer"
host = "right"
path = "channel-{{channel:02d}}.cf32"
per_channel = {{ from = "split.channels", select = "4..7" }}

[[links]]
from = "band.samples"
to = "split.samples"

[[links]]
from = "split.channels"
select = 12
to = "wide.samples"
"""
HOSTS = ("antenna", "left", "right")


class Network:
    """Three hosts: their addresses and the command prefix that runs a program on each."""

    def __init__(self) -> None:
        self.tag = uuid.uuid4().hex[:6]
        self.namespaces: list[str] = []
        self.addresses: dict[str, str] = {}
        self.prefix: dict[str, list[str]] = {}
        self.kind = ""

    def make(self) -> None:
        reason = self._namespaces()
        if reason:
            warnings.warn(f"network namespaces could not be made ({reason}); the hosts are 127.0.0.x addresses "
                          f"of this machine instead", stacklevel=1)
            self.kind = "loopback"
            subnet = 100 + os.getpid() % 100
            for i, host in enumerate(HOSTS):
                self.addresses[host] = f"127.0.{subnet}.{i + 1}"
                self.prefix[host] = []

    def _namespaces(self) -> str | None:
        if os.environ.get("BANDLOOM_TEST_LOOPBACK_HOSTS"):
            return "BANDLOOM_TEST_LOOPBACK_HOSTS is set"
        if os.geteuid() != 0:
            return "not root"
        if shutil.which("ip") is None:
            return "iproute2's 'ip' is not installed"
        switch = f"bl{self.tag}-sw"
        steps = [["ip", "netns", "add", switch], ["ip", "-n", switch, "link", "add", "br0", "type", "bridge"],
                 ["ip", "-n", switch, "link", "set", "br0", "up"]]
        self.namespaces.append(switch)
        subnet = int(self.tag[:2], 16) % 200 + 20
        for i, host in enumerate(HOSTS):
            ns, here, there = f"bl{self.tag}-{host}", f"h{self.tag}{i}", f"s{self.tag}{i}"
            address = f"10.213.{subnet}.{i + 1}"
            steps += [["ip", "netns", "add", ns],
                      ["ip", "link", "add", here, "netns", ns, "type", "veth", "peer", "name", there, "netns", switch],
                      ["ip", "-n", ns, "addr", "add", f"{address}/24", "dev", here],
                      ["ip", "-n", ns, "link", "set", here, "up"], ["ip", "-n", ns, "link", "set", "lo", "up"],
                      ["ip", "-n", switch, "link", "set", there, "master", "br0"],
                      ["ip", "-n", switch, "link", "set", there, "up"]]
            self.namespaces.append(ns)
            self.addresses[host] = address
            self.prefix[host] = ["ip", "netns", "exec", ns]
        for step in steps:
            done = subprocess.run(step, capture_output=True, text=True)
            if done.returncode:
                self.remove()
                self.namespaces, self.addresses, self.prefix = [], {}, {}
                return f"'{' '.join(step)}' failed: {done.stderr.strip()}"
        self.kind = "namespaces"
        return None

    def remove(self) -> None:
        for ns in self.namespaces:
            subprocess.run(["ip", "netns", "del", ns], capture_output=True)


@pytest.fixture(scope="module")
def network():
    net = Network()
    net.make()
    yield net
    net.remove()


def write_flow(folder: Path, network: Network, *, duration: str = "2 s", keys_from: Path | None = None) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    if keys_from is None:
        done = bandloom("keys", folder / "keys")
        assert done.returncode == 0, done.stderr
    else:
        shutil.copytree(keys_from, folder / "keys")
    path = folder / "three.toml"
    path.write_text(FLOW.format(duration=duration, **network.addresses))
    return path


def start_share(network: Network, host: str, flow: Path, out: Path, *extra: str) -> subprocess.Popen:
    out.mkdir(parents=True, exist_ok=True)
    command = network.prefix[host] + [sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--host", host,
                                      "--out", str(out), "--report", str(out / "report.json"), *extra]
    return subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                            start_new_session=True)


def dump_stacks(pid: int) -> None:
    """Print what every process of a share that did not end is doing (py-spy, when installed)."""
    spy = shutil.which("py-spy") or str(Path(sys.executable).parent / "py-spy")
    if not os.path.exists(spy):
        return
    for each in [pid] + descendants(pid):
        done = subprocess.run([spy, "dump", "--pid", str(each)], capture_output=True, text=True, timeout=30)
        print(done.stdout[-3000:], file=sys.stderr)


def finish(processes: dict[str, subprocess.Popen], timeout: float = 180) -> dict[str, tuple[int, str]]:
    results = {}
    for host, process in processes.items():
        try:
            _, err = process.communicate(timeout=timeout)
        except subprocess.TimeoutExpired:
            dump_stacks(process.pid)
            os.killpg(process.pid, signal.SIGKILL)
            _, err = process.communicate()
            pytest.fail(f"share {host} did not end within {timeout} s:\n{err}")
        results[host] = (process.returncode, err)
    return results


def report(out: Path) -> dict:
    return json.loads((out / "report.json").read_text())


def assert_links_account(summary: dict) -> None:
    """Every link of a share's report: what was sent reached its far end or is counted in flight, and each
    sample lost is one entry of the verdict (docs/reliability.md)."""
    for link in summary["links"]:
        if link.get("crosses", "").startswith("from host"):
            continue                            # counted by the share it comes from
        reached = link.get("delivered_samples")
        if reached is not None:
            reached = max(reached, link["received_samples"] or 0)
        else:
            reached = link["received_samples"]
        assert link["sent_samples"] == reached + link["in_flight_samples"] + link["lost_at_restart_samples"], link
    assert summary["lost_samples"] == sum(x["samples"] for x in summary["losses"])


def test_three_shares_give_the_one_machine_outputs(network, tmp_path):
    """Host left runs its four writers two to a process (copies_per_process), fed from another host."""
    flow = write_flow(tmp_path, network)
    rule = 'per_channel = { from = "split.channels", select = "0..3" }'
    flow.write_text(flow.read_text().replace(rule, rule + "\ncopies_per_process = 2"))
    alone = tmp_path / "one-machine"
    done = bandloom("run", flow, "--one-machine", "--out", alone, "--quiet")
    assert done.returncode == 0, done.stderr
    outs = {host: tmp_path / host for host in HOSTS}
    results = finish({host: start_share(network, host, flow, outs[host]) for host in HOSTS})
    for host, (code, err) in results.items():
        assert code == 0, f"{host} ({network.kind}):\n{err}"
        assert "verdict: no sample lost" in err
    for channel in range(8):
        host = "left" if channel < 4 else "right"
        name = f"channel-{channel:02d}.cf32"
        assert (outs[host] / name).read_bytes() == (alone / name).read_bytes(), name
        assert (outs[host] / name).stat().st_size == 400_000 * 8      # 2 s at 200 kHz, 8 bytes a sample
    assert (outs["antenna"] / "wide.cf32").read_bytes() == (alone / "wide.cf32").read_bytes()
    sent = report(outs["antenna"])
    assert_links_account(sent)
    crossing = [x for x in sent["links"] if "crosses" in x]
    assert len(crossing) == 8 and all(x["crosses"] in ("to host left", "to host right") for x in crossing)
    assert len({report(outs["left"])["blocks"][f"low[{c}]"]["pid"] for c in range(4)}) == 2
    for host in ("left", "right"):
        got = report(outs[host])
        assert got["host"] == host and got["other_hosts"]["antenna"]["outcome"] == "finished"
        for x in got["links"]:
            assert x["crosses"] == "from host antenna"
            mirror = next(y for y in crossing if y["link"] == x["link"])
            assert x["received_samples"] == mirror["delivered_samples"] == mirror["sent_samples"] == 400_000
    assert "(to host left)" in results["antenna"][1] and "host right: finished, no sample lost" in results["left"][1]


def test_a_share_with_other_keys_is_refused_and_named(network, tmp_path):
    flow = write_flow(tmp_path / "good", network)
    stranger = write_flow(tmp_path / "stranger", network)          # the same file, a key folder of its own
    assert stranger.read_bytes() == flow.read_bytes()
    processes = {host: start_share(network, host, flow, tmp_path / host, "--wait-for-hosts", "30")
                 for host in ("antenna", "left")}
    processes["right"] = start_share(network, "right", stranger, tmp_path / "right", "--wait-for-hosts", "30")
    results = finish(processes)
    for host, (code, err) in results.items():
        assert code == 1, f"{host}:\n{err}"
        assert "verdict: no sample lost" in err
    for host in ("antenna", "left"):            # the first thing each says names host right and the keys
        first = results[host][1].splitlines()[0]
        assert "right" in first and "key" in first, results[host][1]
    first = results["right"][1].splitlines()[0]
    assert ("antenna" in first or "left" in first) and "key" in first, results["right"][1]
    assert report(tmp_path / "antenna")["links"][0]["sent_samples"] == 0      # no source started


def test_a_missing_share_times_out_naming_it(network, tmp_path):
    flow = write_flow(tmp_path, network)
    results = finish({host: start_share(network, host, flow, tmp_path / host, "--wait-for-hosts", "4")
                      for host in ("antenna", "left")})
    for host, (code, err) in results.items():
        assert code == 1, err
        assert f"not heard from: right at tcp://{network.addresses['right']}:47000" in err, err
        assert "verdict: no sample lost" in err


def start_long_run(network: Network, tmp_path: Path, watched: Path) -> tuple[dict, dict]:
    """Three shares of a 600 s flow, returned (outputs, processes) once ``watched`` (a file below the output
    folders) holds 1 MiB: samples are flowing between the hosts."""
    flow = write_flow(tmp_path, network, duration="600 s")
    outs = {host: tmp_path / host for host in HOSTS}
    processes = {host: start_share(network, host, flow, outs[host]) for host in HOSTS}
    written = tmp_path / watched
    deadline = time.monotonic() + 120
    while not (written.exists() and written.stat().st_size > 1 << 20):
        assert time.monotonic() < deadline, f"no samples reached {watched}"
        assert all(p.poll() is None for p in processes.values())
        time.sleep(0.2)
    return outs, processes


def test_kill_of_a_share_is_reported_by_the_others_with_exact_accounts(network, tmp_path, busy_machine):
    """kill -9 of host right's share (its supervisor, launcher and workers), beside two CPU-bound processes:
    the other shares notice, abort and fail, naming it; on every link, sent = acknowledged or received + in
    flight, and what was on its way to host right is exactly what the verdict counts lost there."""
    outs, processes = start_long_run(network, tmp_path, Path("right") / "channel-04.cf32")
    os.killpg(processes["right"].pid, signal.SIGKILL)           # the share, its launcher and its workers
    killed = time.monotonic()
    results = finish({h: p for h, p in processes.items() if h != "right"}, timeout=60)
    noticed = time.monotonic() - killed
    for host in ("antenna", "left"):
        code, err = results[host]
        assert code == 1, err
        assert "host right" in err and "was lost" in err if host == "antenna" else "host right" in err, err
    summary = report(outs["antenna"])
    assert summary["outcome"] == "failed"
    assert_links_account(summary)
    to_right = [x for x in summary["links"] if x.get("crosses") == "to host right"]
    assert len(to_right) == 4
    lost_to_right = [x for x in summary["losses"] if "high[" in x["where"]]
    # lost on its way to host right: sent and not acknowledged, or still waiting in the sender's batch
    assert sum(x["in_flight_samples"] + x["held_samples"] for x in to_right) == sum(x["samples"] for x in lost_to_right)
    print(results["antenna"][1])
    for x in to_right:
        assert x["delivered_samples"] > 0 and x["sent_samples"] > x["delivered_samples"] - 1
    assert_links_account(report(outs["left"]))
    print(f"\nhost right killed; the other shares ended {noticed:.1f} s later ({network.kind})")


def test_kill_of_the_source_share_is_reported_downstream_with_what_it_last_sent(network, tmp_path):
    """kill -9 of host antenna's share (the source and the split): the consumers' shares fail naming it, and
    each counts, on every link from it, what antenna last said it had sent and did not arrive (often nothing:
    antenna's last status is up to half a second old, and what was still inside it died with it)."""
    outs, processes = start_long_run(network, tmp_path, Path("left") / "channel-00.cf32")
    os.killpg(processes["antenna"].pid, signal.SIGKILL)
    results = finish({h: p for h, p in processes.items() if h != "antenna"}, timeout=60)
    for host in ("left", "right"):
        code, err = results[host]
        assert code == 1 and "host antenna" in err and "was lost" in err, err
        summary = report(outs[host])
        incoming = [x for x in summary["links"] if x.get("crosses") == "from host antenna"]
        assert len(incoming) == 4
        for x in incoming:
            reached = max(x["delivered_samples"], x["received_samples"])
            assert x["in_flight_samples"] == max(0, x["sent_samples"] - reached) and x["received_samples"] > 0
        counted = sum(x["samples"] for x in summary["losses"] if "which was lost" in x["why"])
        assert counted == sum(x["in_flight_samples"] for x in incoming)
        assert summary["lost_samples"] == sum(x["samples"] for x in summary["losses"])


def test_ctrl_c_on_one_share_stops_every_share_and_nothing_is_lost(network, tmp_path):
    """SIGINT to a share that only consumes: it says it is stopping, the source's host ends its stream, the
    stream drains across the hosts, and every share ends with no sample lost; what crossed was taken whole."""
    outs, processes = start_long_run(network, tmp_path, Path("left") / "channel-00.cf32")
    os.kill(processes["left"].pid, signal.SIGINT)
    results = finish(processes, timeout=90)
    assert results["left"][0] in (-signal.SIGINT, 128 + signal.SIGINT), results["left"][1]
    assert results["antenna"][0] == 0 and results["right"][0] == 0, results
    for host, (_, err) in results.items():
        assert "verdict: no sample lost" in err, f"{host}:\n{err}"
    sent = report(outs["antenna"])
    assert sent["outcome"] == "interrupted"
    assert_links_account(sent)
    for x in sent["links"]:
        if "crosses" in x:
            assert x["sent_samples"] == x["delivered_samples"] == x["received_samples"] > 0, x
    assert "host left was asked to stop" in results["antenna"][1]


def paced_flow_with_policy(network: Network, tmp_path: Path, on_failure: str) -> Path:
    """The three-host flow, 6 s paced, its writers on host right with the given on_failure."""
    flow = write_flow(tmp_path, network, duration="6 s")
    text = flow.read_text().replace('[blocks.high]\ntype = "iq-writer"', '[blocks.high]\ntype = "iq-writer"\n'
                                    f'on_failure = "{on_failure}"')
    flow.write_text(text.replace('seed = 11', 'seed = 11\npace = true'))
    return flow


def kill_writer_on_right(processes: dict[str, subprocess.Popen], outs: dict[str, Path]) -> None:
    """kill -9 the worker of high[5] on host right once its file holds 1 MiB."""
    deadline = time.monotonic() + 60
    while True:
        workers = {name: pid for pid, (name, _) in worker_processes(below=processes["right"].pid).items()}
        written = outs["right"] / "channel-05.cf32"
        if "high[5]" in workers and written.exists() and written.stat().st_size > 1 << 20:
            break
        assert time.monotonic() < deadline and all(p.poll() is None for p in processes.values())
        time.sleep(0.1)
    os.kill(workers["high[5]"], signal.SIGKILL)


def test_a_restarted_block_on_another_host_loses_nothing(network, tmp_path):
    """A writer on host right with on_failure = "restart" is killed mid-stream: its share starts a new one,
    which connects to the link's endpoint again; what the dead one had not acknowledged is sent again, what
    its file already holds is skipped, and the file equals the one-machine run's, byte for byte."""
    flow = paced_flow_with_policy(network, tmp_path, "restart")
    alone = tmp_path / "one-machine"
    done = bandloom("run", flow, "--one-machine", "--out", alone, "--quiet")
    assert done.returncode == 0, done.stderr
    outs = {host: tmp_path / host for host in HOSTS}
    processes = {host: start_share(network, host, flow, outs[host]) for host in HOSTS}
    kill_writer_on_right(processes, outs)
    results = finish(processes)
    for host, (code, err) in results.items():
        assert code == 0 and "verdict: no sample lost" in err, f"{host}:\n{err}"
    assert "restarted after" in results["right"][1]
    assert (outs["right"] / "channel-05.cf32").read_bytes() == (alone / "channel-05.cf32").read_bytes()
    link = next(x for x in report(outs["antenna"])["links"] if x["link"].endswith("high[5].samples"))
    assert link["consumers"] == 2 and link["delivered_samples"] == link["sent_samples"]


def test_a_block_left_down_on_another_host_does_not_stall_its_producer(network, tmp_path):
    """A writer on host right with on_failure = "continue" is killed: its share leaves it down and says so;
    the channelizer on host antenna stops sending to it (dropping and counting, as for a local consumer left
    down) instead of waiting for ever, the rest of the flow runs to its end, and every share fails, with the
    rows that never reached the writer counted in antenna's verdict."""
    flow = paced_flow_with_policy(network, tmp_path, "continue")
    outs = {host: tmp_path / host for host in HOSTS}
    processes = {host: start_share(network, host, flow, outs[host]) for host in HOSTS}
    kill_writer_on_right(processes, outs)
    results = finish(processes, timeout=60)
    for host, (code, err) in results.items():
        assert code == 1, f"{host}:\n{err}"
    assert "left down" in results["right"][1]
    sent = report(outs["antenna"])
    assert_links_account(sent)
    link = next(x for x in sent["links"] if x["link"].endswith("high[5].samples"))
    assert link["dropped_while_down_samples"] > 0
    assert link["sent_samples"] + link["dropped_samples"] + link["held_samples"] == 6 * 200_000
    others = [x for x in sent["links"] if "crosses" in x and x is not link]
    assert all(x["delivered_samples"] == x["sent_samples"] == 6 * 200_000 for x in others)
    why = [x["why"] for x in sent["losses"] if "high[5]" in x["where"]]
    assert any('dropped while high[5] was down (on_failure = "continue")' in w for w in why), why


def walk_through_script() -> str:
    """The shell commands of docs/hosts.md, "Try it on one machine", as written there."""
    text = (Path(__file__).parent.parent / "docs" / "hosts.md").read_text()
    part = text.split("## Try it on one machine", 1)[1]
    return part.split("```sh\n", 1)[1].split("```", 1)[0]


def test_the_walk_through_runs_as_written(network, tmp_path):
    """docs/hosts.md's commands for one machine, run by bash from a copy of flows/: three shares in three
    namespaces, each ending with no sample lost, writing what the one-machine run of the file writes."""
    if network.kind != "namespaces":
        pytest.skip("network namespaces cannot be made here (see the warning); the walk-through needs them")
    (tmp_path / "flows").mkdir()
    shutil.copy(Path(__file__).parent.parent / "flows" / "across-hosts.toml", tmp_path / "flows")
    env = dict(os.environ, PATH=f"{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}")
    try:
        done = subprocess.run(["bash", "-e", "-c", walk_through_script()], cwd=tmp_path, env=env, capture_output=True,
                              text=True, timeout=300)
    finally:
        for ns in ("bl-mast", "bl-recorder", "bl-listener", "bl-switch"):
            subprocess.run(["ip", "netns", "del", ns], capture_output=True)
    assert done.returncode == 0, done.stderr
    assert done.stderr.count("bandloom: verdict: no sample lost") == 3, done.stderr
    alone = bandloom("run", "flows/across-hosts.toml", "--one-machine", "--out", "site", "--quiet", cwd=tmp_path)
    assert alone.returncode == 0, alone.stderr
    files = [f"iq/channel-{c:02d}.sigmf-data" for c in range(8)]
    for name in files:
        assert (tmp_path / "site-recorder" / name).read_bytes() == (tmp_path / "site" / name).read_bytes(), name
    for name in ("audio/446.0250MHz.wav", "audio/446.1500MHz.wav"):
        assert (tmp_path / "site-listener" / name).read_bytes() == (tmp_path / "site" / name).read_bytes(), name


def test_links_between_hosts_in_the_clear_are_warned_about(tmp_path):
    """[flow] insecure = true instead of keys: check (and every share's run) says loudly what that means."""
    text = FLOW.format(duration="1 s", antenna="10.0.0.1", left="10.0.0.2", right="10.0.0.3")
    path = tmp_path / "clear.toml"
    path.write_text(text.replace('keys = "keys"', "insecure = true"))
    done = bandloom("check", path)
    assert done.returncode == 0, done.stderr
    assert "warning" in done.stderr and "in the clear, unauthenticated" in done.stderr
    done = bandloom("run", path, "--host", "nowhere")
    assert done.returncode == 1 and "--host 'nowhere' is not a host of" in done.stderr
