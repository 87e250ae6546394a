"""Command-line options shared by several sub-commands, mapped onto Settings keys."""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:  # pydantic is imported when settings are read, not to build --help
    from livequant.config import Settings

__all__ = ["add_settings_arguments", "settings_from_args", "positive_float"]


def positive_float(text: str) -> float:
    """argparse type: a number > 0, with a message saying what was wrong."""
    import argparse

    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not v > 0:
        raise argparse.ArgumentTypeError(f"must be > 0, got {text}")
    return v

#: flag -> dotted settings key
_FLAGS = {
    "pixel_size_pm": "frame_defaults.pixel_size_pm",
    "detector": "frame_defaults.detector",
    "material": "analysis.material",
    "materials": "analysis.materials_file",
    "reference_material": "analysis.calibration.reference_material",
}


def add_settings_arguments(parser) -> None:
    g = parser.add_argument_group("settings (override config files and LIVEQUANT_* variables)")
    g.add_argument("--config", metavar="FILE", help="a TOML file of settings (see config/default.toml)")
    g.add_argument("--pixel-size-pm", "--pixel-size", type=float, metavar="PM",
                   dest="pixel_size_pm",
                   help="pixel size for frames whose sidecar gives none, picometres "
                        "(--pixel-size: the same, the old spelling of `run`)")
    g.add_argument("--detector", metavar="NAME", help="detector for frames whose sidecar gives "
                   "none (HAADF, ABF, BF)")
    g.add_argument("--material", metavar="NAME",
                   help="material of the specimen (an entry of config/materials.toml or of "
                        "--materials FILE); without it there is no polarization (pol_*)")
    g.add_argument("--materials", metavar="FILE",
                   help="your own material table (TOML, like config/materials.toml; every "
                        "entry needs a `source`), added to the shipped one")
    g.add_argument("--reference-material", metavar="NAME",
                   help="check the pixel size against this material's lattice parameter")
    g.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="any setting by its dotted key, e.g. analysis.refine.max_iterations=50")


def settings_from_args(args) -> Settings:
    from livequant.config import ConfigError, check_materials, load_settings, parse_scalar

    overrides = {key: getattr(args, flag, None) for flag, key in _FLAGS.items()}
    for item in getattr(args, "set", []) or []:
        if "=" not in item:
            raise ConfigError(f"--set {item!r}: expected KEY=VALUE, e.g. "
                              "analysis.refine.max_iterations=50")
        key, _, text = item.partition("=")
        overrides[key.strip()] = parse_scalar(text.strip())
    settings = load_settings(getattr(args, "config", None), overrides=overrides)
    check_materials(settings)
    return settings
