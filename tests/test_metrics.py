"""The metrics endpoint: scraped with a plain HTTP client while a real flow runs, parsed with
prometheus_client's own parser of the text exposition format (reference implementation of the format)."""

import socket
import subprocess
import sys
import time
import urllib.request

from bandloom.runtime import shared_rings
from prometheus_client.parser import text_string_to_metric_families
from runner import bandloom


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def scrape(url):
    with urllib.request.urlopen(url, timeout=5) as response:
        assert response.headers["Content-Type"].startswith("text/plain")
        families = text_string_to_metric_families(response.read().decode())
    return {(s.name, tuple(sorted(s.labels.items()))): s.value for f in families for s in f.samples}


def test_metrics_are_scraped_during_a_run(tmp_path):
    """A paced 4 s scenario into a discard: scraped twice while it runs, the sent and received counters grow,
    in flight (sent - received, as the two blocks last reported them; each block's figures are up to half a
    second old, so in flight is never below 0) and queue fill are there, the blocks are 'running'. The
    endpoint is gone after the run."""
    port = free_port()
    flow = tmp_path / "paced.toml"
    flow.write_text('[blocks.band]\ntype = "scenario"\nsample_rate = 200000\nduration = 4\nchunk_size = 10000\n'
                    'pace = true\n[blocks.sink]\ntype = "discard"\n'
                    '[[links]]\nfrom = "band.samples"\nto = "sink.samples"\n')
    runner = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--out", str(tmp_path),
                               "--metrics", str(port)], stderr=subprocess.PIPE, text=True)
    url = f"http://127.0.0.1:{port}/metrics"
    link = (("link", "band.samples -> sink.samples"),)
    seen = []
    deadline = time.monotonic() + 60
    while len(seen) < 2 and time.monotonic() < deadline:
        time.sleep(0.7)
        try:
            values = scrape(url)
        except OSError:
            continue
        if values.get(("bandloom_link_sent_samples_total", link), 0) > 0:
            seen.append(values)
    stderr = runner.communicate(timeout=60)[1]
    assert runner.returncode == 0, stderr
    assert f"metrics at {url}" in stderr
    first, second = seen
    assert second["bandloom_link_sent_samples_total", link] > first["bandloom_link_sent_samples_total", link]
    assert second["bandloom_link_received_samples_total", link] > first["bandloom_link_received_samples_total", link]
    for values in seen:
        sent = values["bandloom_link_sent_samples_total", link]
        received = values["bandloom_link_received_samples_total", link]
        assert values["bandloom_link_in_flight_samples", link] == max(0, sent - received)
        assert 0 <= values["bandloom_link_queue_fill_ratio", link] <= 1
        assert values["bandloom_link_dropped_samples_total", link] == 0
        messages = values["bandloom_link_sent_messages_total", link]
        shared = values["bandloom_link_shared_memory_messages_total", link]
        assert messages > 0 and shared == (messages if shared_rings.SUPPORTED else 0)
        assert values["bandloom_block_state", (("bandloom_block_state", "running"), ("block", "sink"))] == 1
        assert values["bandloom_block_restarts_total", (("block", "sink"),)] == 0
    try:
        urllib.request.urlopen(url, timeout=2)
        raise AssertionError("the metrics endpoint outlived the run")
    except OSError:
        pass


def test_a_metrics_address_that_is_not_one_is_refused_in_one_line(tmp_path):
    flow = tmp_path / "f.toml"
    flow.write_text('[blocks.band]\ntype = "scenario"\nsample_rate = 1000\nduration = 1\n'
                    '[blocks.sink]\ntype = "discard"\n[[links]]\nfrom = "band.samples"\nto = "sink.samples"\n')
    done = bandloom("run", flow, "--metrics", "localhost:http", "--out", tmp_path)
    assert done.returncode == 1
    assert done.stderr == ("bandloom: --metrics 'localhost:http': expected [HOST:]PORT with a numeric address, "
                           "for example 9464 or 127.0.0.1:9464\n")
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        done = bandloom("run", flow, "--metrics", str(taken.getsockname()[1]), "--out", tmp_path)
    assert done.returncode == 1 and "cannot serve there: Address already in use" in done.stderr
    assert "Traceback" not in done.stderr
