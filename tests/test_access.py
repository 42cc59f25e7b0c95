"""Access: key folders only their owner can read, what other local users cannot reach, and signals.

The second-user tests need root (to become ``nobody``) and are skipped with the reason otherwise.
"""

import os
import pwd
import signal
import stat
import subprocess
import sys
import time

import pytest
from bandloom.runtime import shared_rings
from runner import bandloom, worker_processes

SOURCE = '''[blocks.band]
type = "scenario"
sample_rate = "1 MHz"
duration = "{duration}"
pace = true
chunk_size = 10000
transmitters = [{{ kind = "cw", frequency = "100 kHz", level = "-20 dBFS" }}]
'''


def endpoint_flow(tmp_path, extra):
    flow = tmp_path / "open.toml"
    flow.write_text(SOURCE.format(duration="0.1 s") + f'\n[[links]]\nfrom = "band.samples"\n'
                                                        f'endpoint = "tcp://0.0.0.0:47611"\n{extra}\n')
    return flow


def mode(path):
    return stat.S_IMODE(path.stat().st_mode)


def test_bandloom_keys_makes_secrets_only_their_owner_can_read(tmp_path):
    """Folders 0700, secret keys 0600, public keys 0644, whatever the umask was."""
    done = subprocess.run([sys.executable, "-m", "bandloom.runtime", "keys", str(tmp_path / "k")], capture_output=True,
                          text=True, preexec_fn=lambda: os.umask(0o022))
    assert done.returncode == 0, done.stderr
    keys = tmp_path / "k"
    assert mode(keys) == mode(keys / "authorized") == 0o700
    assert mode(keys / "server.key_secret") == mode(keys / "client.key_secret") == 0o600
    assert mode(keys / "server.key") == mode(keys / "authorized" / "client.key") == 0o644


def test_check_refuses_a_secret_other_users_can_read_and_a_damaged_one(tmp_path):
    """A secret made readable to the group is refused naming the file and the chmod that fixes it; a damaged
    secret is refused naming the file; a good folder passes."""
    assert bandloom("keys", tmp_path / "k").returncode == 0
    flow = endpoint_flow(tmp_path, 'keys = "k"')
    assert bandloom("check", flow).returncode == 0
    secret = tmp_path / "k" / "server.key_secret"
    os.chmod(secret, 0o640)
    done = bandloom("check", flow)
    assert done.returncode == 1
    assert f"{secret} can be read by other local users (mode 0640); run chmod 600 {secret}" in done.stderr
    os.chmod(secret, 0o600)
    secret.write_text("metadata\ncurve\n    public-key = \"short\"\n")
    done = bandloom("check", flow)
    assert done.returncode == 1
    assert f"{secret} holds no usable key pair" in done.stderr or f"{secret} is not a key file" in done.stderr, \
        done.stderr
    assert "Traceback" not in done.stderr


def test_an_endpoint_in_the_clear_is_warned_about_at_check(tmp_path):
    """insecure = true on a wildcard address: check passes but says, in one line, who can read it."""
    done = bandloom("check", endpoint_flow(tmp_path, "insecure = true"))
    assert done.returncode == 0
    assert "links[0]: tcp://0.0.0.0:47611 sends samples in the clear, unauthenticated" in done.stderr


def test_sigterm_drains_the_flow_and_ends_killed_by_sigterm(tmp_path):
    """SIGTERM to the run: the sources end, the writer closes its file, the summary says interrupted, and
    the command ends killed by SIGTERM (status 143 in a shell), not by SIGINT."""
    flow = tmp_path / "long.toml"
    flow.write_text(SOURCE.format(duration="60 s") + '\n[blocks.keep]\ntype = "iq-writer"\npath = "all.cf32"\n'
                    '\n[[links]]\nfrom = "band.samples"\nto = "keep.samples"\n')
    run = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--out", str(tmp_path / "out"),
                            "--quiet"], stderr=subprocess.PIPE, text=True)
    data = tmp_path / "out" / "all.cf32"
    deadline = time.monotonic() + 60
    while not (data.exists() and data.stat().st_size > 0) and time.monotonic() < deadline:
        time.sleep(0.05)
    run.send_signal(signal.SIGTERM)
    _, stderr = run.communicate(timeout=60)
    assert run.returncode == -signal.SIGTERM, stderr
    assert "Traceback" not in stderr
    assert data.stat().st_size % 8 == 0 and data.stat().st_size > 0


def as_nobody():
    """preexec_fn: become the unprivileged user 'nobody'."""
    user = pwd.getpwnam("nobody")
    os.setgroups([])
    os.setgid(user.pw_gid)
    os.setuid(user.pw_uid)


PROBE_PYTHON = "/usr/bin/python3"      # the project's interpreter may sit where 'nobody' cannot run it
needs_root = pytest.mark.skipif(os.geteuid() != 0 or not os.access(PROBE_PYTHON, os.X_OK),
                                reason="becoming a second local user needs root, and a system python3 to run as it")


def as_other_user(code):
    return subprocess.run([PROBE_PYTHON, "-c", code], capture_output=True, text=True, preexec_fn=as_nobody, timeout=30)


@needs_root
def test_another_local_user_cannot_read_the_secret_key():
    """User 'nobody' cannot read a secret bandloom keys made (a 0700 folder, a 0600 file), though the folder
    above it is open to everyone (checked: nobody can list it)."""
    import shutil
    import tempfile
    top = tempfile.mkdtemp(prefix="bandloom-access-", dir="/tmp")
    try:
        os.chmod(top, 0o755)
        assert bandloom("keys", f"{top}/k").returncode == 0
        assert as_other_user(f"import os; assert 'k' in os.listdir({top!r})").returncode == 0
        done = as_other_user(f"open({top + '/k/server.key_secret'!r}).read()")
        assert done.returncode == 1 and "PermissionError" in done.stderr, done.stderr
    finally:
        shutil.rmtree(top)


@needs_root
def test_another_local_user_cannot_reach_a_running_flows_sockets(tmp_path):
    """While a flow runs, 'nobody' can neither list its private folder, nor connect to a link's socket, nor
    open the link's shared memory through the workers' descriptors (/proc/PID/fd)."""
    flow = tmp_path / "long.toml"
    flow.write_text(SOURCE.format(duration="30 s") + '\n[blocks.sink]\ntype = "discard"\n'
                    '\n[[links]]\nfrom = "band.samples"\nto = "sink.samples"\n')
    before = set(os.listdir("/tmp"))
    run = subprocess.Popen([sys.executable, "-m", "bandloom.runtime", "run", str(flow), "--out", str(tmp_path / "out"),
                            "--quiet"], stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.monotonic() + 30
        folders = []
        while not folders and time.monotonic() < deadline:
            folders = [f for f in set(os.listdir("/tmp")) - before if f.startswith("bandloom-")]
            time.sleep(0.05)
        assert folders
        folder = f"/tmp/{folders[0]}"
        probe = ("import os, socket, sys\n"
                 f"try:\n    os.listdir({folder!r}); sys.exit('listed')\nexcept PermissionError: pass\n"
                 f"s = socket.socket(socket.AF_UNIX)\n"
                 f"try:\n    s.connect({folder + '/0'!r}); sys.exit('connected')\nexcept PermissionError: pass\n")
        done = as_other_user(probe)
        assert done.returncode == 0, done.stderr
        if shared_rings.SUPPORTED:               # the link's shared memory: reachable through no path of theirs
            rings = [f"/proc/{pid}/fd/{fd}" for pid in worker_processes(below=run.pid)
                     for fd in os.listdir(f"/proc/{pid}/fd")
                     if os.readlink(f"/proc/{pid}/fd/{fd}").startswith("/memfd:bandloom-link-")]
            assert rings
            probe = "".join(f"try:\n    open({path!r}, 'rb'); raise SystemExit('opened {path}')\n"
                            f"except PermissionError: pass\n" for path in rings)
            done = as_other_user(probe)
            assert done.returncode == 0, done.stderr
    finally:
        run.send_signal(signal.SIGINT)
        run.communicate(timeout=60)


def test_a_writer_does_not_write_through_a_symbolic_link_it_did_not_make(tmp_path):
    """Someone put a link where an output goes, pointing at a file of theirs: the run fails naming the link,
    and the file it points to is untouched."""
    out = tmp_path / "out"
    out.mkdir()
    victim = tmp_path / "precious.txt"
    victim.write_text("keep me")
    (out / "all.cf32").symlink_to(victim)
    flow = tmp_path / "short.toml"
    flow.write_text(SOURCE.format(duration="0.05 s").replace("pace = true", "pace = false")
                    + '\n[blocks.keep]\ntype = "iq-writer"\npath = "all.cf32"\nmetadata = false\n'
                    '\n[[links]]\nfrom = "band.samples"\nto = "keep.samples"\n')
    done = bandloom("run", flow, "--out", out, "--quiet")
    assert done.returncode == 1
    assert f"{out / 'all.cf32'}: is a symbolic link; bandloom does not write through links it did not make" \
        in done.stderr, done.stderr
    assert victim.read_text() == "keep me"
    assert "Traceback" not in done.stderr
