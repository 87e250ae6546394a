"""``livequant keys DIR``: make the ZeroMQ CURVE keys for sockets beyond loopback."""

from __future__ import annotations

import json
import sys

__all__ = ["register", "keys_command"]


def register(subparsers) -> None:
    p = subparsers.add_parser(
        "keys", help="make CURVE keys so the daemon's sockets may leave 127.0.0.1",
        description="Write a server and a client key pair (ZeroMQ CURVE) into DIR, and "
                    "DIR/authorized_clients/ holding the client's public key.  The daemon binds "
                    "to a non-loopback address only with `daemon.allow_remote = true` and these "
                    "keys; clients then need client.key_secret and server.key.  Secret files "
                    "are readable by their owner only; keep them off shared folders.")
    p.add_argument("dir", metavar="DIR", help="folder for the key files (created if missing)")
    p.add_argument("--force", action="store_true",
                   help="replace existing keys (clients holding the old ones are locked out)")
    p.add_argument("--json", action="store_true", help="one JSON object of the paths on stdout")
    p.set_defaults(func=keys_command)


def keys_command(args) -> int:
    from livequant.cli import EXIT_BAD_INPUT
    from livequant.daemon.security import KeysExistError, make_keys

    try:
        paths = make_keys(args.dir, force=args.force)
    except KeysExistError as exc:
        print(f"livequant keys: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except OSError as exc:
        print(f"livequant keys: cannot write keys into {args.dir}: {exc.strerror or exc}",
              file=sys.stderr)
        return EXIT_BAD_INPUT
    if args.json:
        print(json.dumps({k: str(v) for k, v in paths.items()}))
    print(f"keys written to {args.dir}.  For the daemon, in your TOML configuration:\n"
          f"  [daemon]\n"
          f"  host = \"...\"                      # the address to bind, if not 127.0.0.1\n"
          f"  allow_remote = true\n"
          f"  curve_server_secret_key = \"{paths['server_secret']}\"\n"
          f"  curve_authorized_clients = \"{paths['authorized_clients']}\"\n"
          f"Give each client {paths['client_secret'].name} and {paths['server_public'].name}; "
          f"add more clients by copying their public .key files into "
          f"{paths['authorized_clients']}.", file=sys.stderr)
    return 0
