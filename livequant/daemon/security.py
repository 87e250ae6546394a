"""Who may talk to the daemon's sockets.

By default every socket binds to 127.0.0.1: only programs on the same machine
reach it.  Binding to any other address needs two explicit settings, because
ZeroMQ sockets carry no authentication of their own:

- ``daemon.allow_remote = true``, and
- ZeroMQ CURVE keys (made by ``livequant keys DIR``):
  ``daemon.curve_server_secret_key`` (the daemon's secret key file) and
  ``daemon.curve_authorized_clients`` (a folder of the public key files of
  the clients allowed in).

With CURVE on, every socket (ingest, events, commands) is a CURVE server and a
ZAP authenticator thread admits only the listed client keys; traffic is
encrypted.  ``daemon.curve = true`` turns it on for loopback too.

The key files are the format of ``zmq.auth.create_certificates``:
``NAME.key`` (public) and ``NAME.key_secret`` (public and secret, mode 0600).
"""

from __future__ import annotations

import ipaddress
import os
import shutil
from dataclasses import dataclass
from pathlib import Path

from livequant.daemon.session import SetupError

__all__ = ["CurveServerKeys", "CurveClientKeys", "is_loopback", "bind_policy",
           "apply_curve_server", "apply_curve_client", "start_authenticator", "make_keys",
           "load_client_keys", "KeysExistError"]

SERVER_NAME = "server"
CLIENT_NAME = "client"
AUTHORIZED_DIR = "authorized_clients"


@dataclass(frozen=True)
class CurveServerKeys:
    """The daemon's key pair and the folder of authorised client public keys."""

    public: bytes
    secret: bytes
    authorized_dir: Path


@dataclass(frozen=True)
class CurveClientKeys:
    """A client's key pair and the public key of the server it talks to."""

    public: bytes
    secret: bytes
    server_public: bytes


def is_loopback(host: str) -> bool:
    """True for ``localhost``, 127.0.0.0/8 and ``::1`` (a bracketed IPv6 is accepted)."""
    h = host.strip().strip("[]")
    if h == "localhost":
        return True
    try:
        return ipaddress.ip_address(h).is_loopback
    except ValueError:
        return False  # a host name or an interface name: not provably local


def _load_secret(path: Path, what: str) -> tuple[bytes, bytes]:
    import zmq.auth

    if not path.is_file():
        raise SetupError(f"{what} {path} does not exist; make keys with `livequant keys DIR`")
    try:
        public, secret = zmq.auth.load_certificate(path)
    except (OSError, ValueError) as exc:
        raise SetupError(f"{what} {path} is not a ZeroMQ key file ({exc})") from None
    if not secret:
        raise SetupError(f"{what} {path} holds no secret key; point it at the `.key_secret` "
                         "file written by `livequant keys`")
    return public, secret


def bind_policy(cfg) -> CurveServerKeys | None:
    """Check the socket settings before anything binds; the CURVE keys to use, or None.

    Raises
    ------
    SetupError
        A non-loopback host without ``allow_remote``, or CURVE required (remote
        host or ``curve = true``) without usable keys.  Each message says which
        setting to change.
    """
    remote = not is_loopback(cfg.host)
    if remote and not cfg.allow_remote:
        raise SetupError(
            f"`daemon.host` = {cfg.host!r} is not a loopback address: the sockets would be "
            "reachable from other machines.  Keep 127.0.0.1, or set `daemon.allow_remote = "
            "true` together with CURVE keys (`livequant keys DIR`, then "
            "`daemon.curve_server_secret_key` and `daemon.curve_authorized_clients`)")
    if not (remote or cfg.curve):
        return None
    why = f"binding to {cfg.host!r}" if remote else "`daemon.curve = true`"
    if not cfg.curve_server_secret_key or not cfg.curve_authorized_clients:
        raise SetupError(
            f"{why} requires CURVE authentication: set `daemon.curve_server_secret_key` (the "
            "server.key_secret file) and `daemon.curve_authorized_clients` (the folder of "
            "client public keys); make them with `livequant keys DIR`")
    public, secret = _load_secret(Path(cfg.curve_server_secret_key).expanduser(),
                                  "`daemon.curve_server_secret_key`")
    authorized = Path(cfg.curve_authorized_clients).expanduser()
    if not authorized.is_dir():
        raise SetupError(f"`daemon.curve_authorized_clients` {authorized} is not a folder")
    if not any(authorized.glob("*.key")):
        raise SetupError(f"`daemon.curve_authorized_clients` {authorized} holds no public key "
                         "(*.key): no client could connect")
    return CurveServerKeys(public=public, secret=secret, authorized_dir=authorized)


def apply_curve_server(sock, keys: CurveServerKeys | None) -> None:
    """Make `sock` a CURVE server (before it binds); no-op without keys."""
    if keys is None:
        return
    sock.curve_secretkey = keys.secret
    sock.curve_publickey = keys.public
    sock.curve_server = True


def apply_curve_client(sock, keys: CurveClientKeys | None) -> None:
    """Make `sock` a CURVE client of the server whose public key is in `keys` (before connect)."""
    if keys is None:
        return
    sock.curve_secretkey = keys.secret
    sock.curve_publickey = keys.public
    sock.curve_serverkey = keys.server_public


def start_authenticator(context, keys: CurveServerKeys):
    """Start the ZAP thread that admits only the clients whose public keys are listed."""
    from zmq.auth.thread import ThreadAuthenticator

    auth = ThreadAuthenticator(context)
    auth.start()
    auth.configure_curve(domain="*", location=str(keys.authorized_dir))
    return auth


def load_client_keys(client_secret_key: str | os.PathLike,
                     server_public_key: str | os.PathLike) -> CurveClientKeys:
    """A client's keys from the files written by :func:`make_keys`."""
    import zmq.auth

    public, secret = _load_secret(Path(client_secret_key), "client secret key")
    server_public, _ = zmq.auth.load_certificate(Path(server_public_key))
    return CurveClientKeys(public=public, secret=secret, server_public=server_public)


class KeysExistError(FileExistsError):
    """Key files are already there; they are only replaced with ``force``."""


def make_keys(directory: str | os.PathLike, *, force: bool = False) -> dict[str, Path]:
    """Write a server and a client key pair and the authorised-clients folder.

    ::

        DIR/server.key  server.key_secret      the daemon's pair
        DIR/client.key  client.key_secret      one client's pair
        DIR/authorized_clients/client.key      the clients the daemon admits

    Secret files are mode 0600 and the folder 0700.  Returns the paths by role.

    Raises
    ------
    KeysExistError
        When any of these files exists and `force` is False (replacing keys
        locks out every client holding the old ones).
    """
    import zmq.auth

    d = Path(directory).expanduser()
    out = {
        "server_public": d / f"{SERVER_NAME}.key",
        "server_secret": d / f"{SERVER_NAME}.key_secret",
        "client_public": d / f"{CLIENT_NAME}.key",
        "client_secret": d / f"{CLIENT_NAME}.key_secret",
        "authorized_clients": d / AUTHORIZED_DIR,
    }
    existing = [p for k, p in out.items() if k != "authorized_clients" and p.exists()]
    if existing and not force:
        raise KeysExistError(f"{', '.join(str(p) for p in existing)} already exist; "
                             "use --force to replace them (clients holding the old keys "
                             "are then locked out)")
    d.mkdir(parents=True, exist_ok=True)
    os.chmod(d, 0o700)
    old = os.umask(0o077)  # no moment at which a secret file is readable by others
    try:
        for name in (SERVER_NAME, CLIENT_NAME):
            for suffix in (".key", ".key_secret"):
                (d / f"{name}{suffix}").unlink(missing_ok=True)
            zmq.auth.create_certificates(d, name)
        out["authorized_clients"].mkdir(exist_ok=True)
        shutil.copyfile(out["client_public"], out["authorized_clients"] / f"{CLIENT_NAME}.key")
    finally:
        os.umask(old)
    for key in ("server_secret", "client_secret"):
        os.chmod(out[key], 0o600)
    for key in ("server_public", "client_public"):
        os.chmod(out[key], 0o644)
    return out
