"""CURVE key folders: made by ``bandloom keys``, checked by ``check`` and again before a link uses them.

A folder holds ``server.key_secret`` (the link's key pair), ``server.key`` (its
public key, for the outside program), ``client.key_secret`` (a key pair for
the outside program, to be moved to its machine) and ``authorized/`` (public
keys allowed to connect). Secrets are 0600 and the folders 0700, owned by the
user who runs the flow; a folder or secret that another local user can read
is refused, since whoever reads the secret key can decrypt or impersonate the
link (zmq.auth's own ``create_certificates`` leaves them as the umask makes
them, often 0644).
"""

from __future__ import annotations

import os
import shutil
import stat
from collections.abc import Callable
from pathlib import Path

from bandloom.blocks.params import path_problem, shortened

__all__ = ["KeyFolderError", "client_folder_problem", "key_folder_problem", "load_server_keys", "make_key_folder"]


class KeyFolderError(ValueError):
    """A key folder that cannot be used; the message names the file and what would be right."""


def make_key_folder(folder: str | Path) -> Path:
    """Create a new key folder (see the module doc); refuse a folder that already has files in it."""
    import zmq.auth

    folder = Path(folder)
    if folder.exists() and any(folder.iterdir()):
        raise KeyFolderError(f"{folder} is not empty; choose a new folder so no key is overwritten")
    folder.mkdir(mode=0o700, parents=True, exist_ok=True)
    (folder / "authorized").mkdir(mode=0o700, exist_ok=True)
    for path in (folder, folder / "authorized"):
        os.chmod(path, 0o700)
    old = os.umask(0o077)              # secrets are never readable by others, not even for a moment
    try:
        zmq.auth.create_certificates(str(folder), "server")
        client_public, _ = zmq.auth.create_certificates(str(folder), "client")
        shutil.copy(client_public, folder / "authorized" / "client.key")
    finally:
        os.umask(old)
    for name in ("server.key", "client.key", "authorized/client.key"):
        os.chmod(folder / name, 0o644)
    return folder


def _open_to_others(path: Path) -> str | None:
    info = path.stat()
    if info.st_uid != os.getuid():
        return f"{path} belongs to another user (uid {info.st_uid})"
    if info.st_mode & 0o077:
        return (f"{path} can be read by other local users (mode {stat.S_IMODE(info.st_mode):04o}); "
                f"run chmod {'700' if path.is_dir() else '600'} {path}")
    return None


def _unreadable(folder: str | Path, check: Callable[[Path], str | None]) -> str | None:
    """``check(folder)``, or what stops the folder being looked at (a path the OS refuses, a folder this
    user may not enter) as a problem naming it, instead of the OS error."""
    problem = path_problem(str(folder))
    if problem:
        return f"{shortened(str(folder))}: {problem}"
    try:
        return check(Path(folder))
    except OSError as error:
        return f"{shortened(str(error.filename or folder))} cannot be read: {error.strerror or error}"


def key_folder_problem(folder: str | Path) -> str | None:
    """What is wrong with a key folder, or None: files missing, not key files, or open to other users."""
    return _unreadable(folder, _key_folder_problem)


def _key_folder_problem(folder: Path) -> str | None:
    import zmq.auth

    secret = folder / "server.key_secret"
    if not secret.is_file():
        return f"{secret} is missing; make the folder with 'bandloom keys FOLDER'"
    for path in (folder, secret):
        problem = _open_to_others(path)
        if problem:
            return problem
    try:
        public, secret_key = zmq.auth.load_certificate(str(secret))
    except Exception as error:             # zmq.auth raises several kinds for a damaged file
        return f"{secret} is not a key file made by 'bandloom keys' ({type(error).__name__}: {error})"
    if not secret_key or len(public) != 40 or len(secret_key) != 40:
        return f"{secret} holds no usable key pair; make the folder again with 'bandloom keys FOLDER'"
    authorized = folder / "authorized"
    if not authorized.is_dir():
        return f"{authorized} is missing: no client could connect"
    for key in sorted(authorized.glob("*.key")):
        try:
            zmq.auth.load_certificate(str(key))
        except Exception as error:
            return f"{key} is not a public key file ({type(error).__name__}: {error})"
    return None


def load_server_keys(folder: str | Path) -> tuple[bytes, bytes]:
    """(public, secret) of a key folder that passes :func:`key_folder_problem`; KeyFolderError otherwise."""
    import zmq.auth

    problem = key_folder_problem(folder)
    if problem:
        raise KeyFolderError(problem)
    public, secret = zmq.auth.load_certificate(str(Path(folder) / "server.key_secret"))
    assert secret is not None
    return public, secret


def client_folder_problem(folder: str | Path) -> str | None:
    """What is wrong with the keys a consumer connects with, or None: ``client.key_secret`` (its own key
    pair, secret, not open to other users) and ``server.key`` (the endpoint's public key), both loadable."""
    return _unreadable(folder, _client_folder_problem)


def _client_folder_problem(folder: Path) -> str | None:
    import zmq.auth

    secret, server = folder / "client.key_secret", folder / "server.key"
    for path in (secret, server):
        if not path.is_file():
            return f"{path} is missing; copy client.key_secret and server.key from the endpoint's 'bandloom keys' folder"
    for path in (folder, secret):
        problem = _open_to_others(path)
        if problem:
            return problem
    for path in (secret, server):
        try:
            public, _ = zmq.auth.load_certificate(str(path))
        except Exception as error:             # zmq.auth raises several kinds for a damaged file
            return f"{path} is not a key file made by 'bandloom keys' ({type(error).__name__}: {error})"
        if len(public) != 40:
            return f"{path} holds no usable key; copy it again from the 'bandloom keys' folder"
    return None
