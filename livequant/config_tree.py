"""Reading the configuration's sources into one raw tree, without the schema.

The default file, the user's file (``--config`` or ``$LIVEQUANT_CONFIG``), the
``LIVEQUANT_*`` environment and the command line's dotted keys, merged in that
order.  :func:`livequant.config.load_settings` validates the tree; this module
imports no pydantic, so a command a person types that needs one raw value (the
beam current of the ledger-side ``proposals``) stays quick.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any, Mapping

try:  # Python >= 3.11
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib  # type: ignore[no-redef]

CONFIG_DIR = Path(__file__).resolve().parent.parent / "config"
DEFAULT_TOML = CONFIG_DIR / "default.toml"
ENV_PREFIX = "LIVEQUANT_"


class ConfigError(ValueError):
    """Invalid configuration: names the key, the value and what is allowed."""


def _deep_merge(base: dict, top: Mapping) -> dict:
    out = dict(base)
    for key, value in top.items():
        if isinstance(value, Mapping) and isinstance(out.get(key), dict):
            out[key] = _deep_merge(out[key], value)
        else:
            out[key] = value
    return out


def _read_toml(path: Path) -> dict:
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(f"config file {path} does not exist") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"config file {path} is not valid TOML: {exc}") from None


def _set_dotted(tree: dict, dotted: str, value: Any) -> None:
    parts = [p for p in dotted.split(".") if p]
    node = tree
    for part in parts[:-1]:
        node = node.setdefault(part, {})
        if not isinstance(node, dict):
            raise ConfigError(f"`{dotted}`: `{part}` is a value, not a section")
    node[parts[-1]] = value


def parse_scalar(text: str) -> Any:
    """Parse an environment or command-line value as a TOML scalar, else a string."""
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text


def env_overrides(environ: Mapping[str, str] | None = None) -> dict:
    environ = os.environ if environ is None else environ
    tree: dict = {}
    for name, text in environ.items():
        if not name.startswith(ENV_PREFIX) or name == ENV_PREFIX + "CONFIG":
            continue
        dotted = name[len(ENV_PREFIX):].lower().replace("__", ".")
        _set_dotted(tree, dotted, parse_scalar(text))
    return tree


def settings_tree(config_file: str | os.PathLike | None = None, *,
                  overrides: Mapping[str, Any] | None = None,
                  environ: Mapping[str, str] | None = None,
                  use_default_toml: bool = True) -> dict:
    """The merged, unvalidated settings tree (see `livequant.config.load_settings`)."""
    environ = os.environ if environ is None else environ
    tree: dict = {}
    if use_default_toml and DEFAULT_TOML.exists():
        tree = _deep_merge(tree, _read_toml(DEFAULT_TOML))
    config_file = config_file or environ.get(ENV_PREFIX + "CONFIG")
    if config_file:
        tree = _deep_merge(tree, _read_toml(Path(config_file)))
    tree = _deep_merge(tree, env_overrides(environ))
    cli_tree: dict = {}
    for dotted, value in (overrides or {}).items():
        if value is not None:
            _set_dotted(cli_tree, dotted, value)
    return _deep_merge(tree, cli_tree)
