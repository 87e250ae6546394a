"""Settings: validated once, frozen, with a documented source order.

Sources, highest first: command-line overrides > environment variables
(``LIVEQUANT_SECTION__KEY=value``) > a user TOML file > ``config/default.toml``
> the field defaults below.  Unknown keys are errors, so a typo fails at
start-up instead of being ignored for a whole session.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any, Literal, Mapping

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

# reading and merging the sources is pydantic-free (livequant.config_tree), so a
# command that needs one raw value need not import the schema
from livequant.config_tree import (CONFIG_DIR, DEFAULT_TOML, ENV_PREFIX, ConfigError,  # noqa: F401
                                   _read_toml, env_overrides, parse_scalar, settings_tree)

__all__ = [
    "Settings",
    "ConfigError",
    "load_settings",
    "CONFIG_DIR",
    "DEFAULT_TOML",
    "MATERIALS_TOML",
    "Material",
    "LandauCoefficients",
    "load_materials",
    "check_materials",
]

MATERIALS_TOML = CONFIG_DIR / "materials.toml"


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class FrameDefaults(_Model):
    """Metadata used when a frame's sidecar does not give it."""

    pixel_size_pm: float | None = Field(default=None, gt=0)
    dwell_time_us: float | None = Field(default=None, gt=0)
    detector: str = "HAADF"
    stage_x_nm: float = 0.0
    stage_y_nm: float = 0.0
    scan_rotation_deg: float = 0.0
    beam_current_pa: float | None = Field(default=None, gt=0)

    def as_dict(self) -> dict:
        return self.model_dump()


class LatticeSettings(_Model):
    min_spacing_px: float = Field(default=4.0, gt=1)
    max_spacing_fraction: float = Field(default=0.25, gt=0, le=0.5)
    min_quality: float = Field(default=15.0, gt=0)


class DetectionSettings(_Model):
    min_distance_fraction: float = Field(default=0.3, gt=0, lt=1)
    min_prominence_sigma: float = Field(default=3.0, ge=0)
    border_fraction: float = Field(default=0.35, ge=0, le=1)


class RefineSettings(_Model):
    window_fraction: float = Field(default=0.3, gt=0, le=0.6)
    max_iterations: int = Field(default=30, ge=1, le=500)
    tolerance_px: float = Field(default=1e-4, gt=0)
    elliptical: bool = True
    joint_neighbours: bool = True
    weighting: Literal["poisson", "uniform"] = "poisson"
    gain_counts_per_electron: float = Field(default=1.0, gt=0)
    min_significance: float = Field(default=2.0, ge=0)
    fixed_shape_fallback: bool = True
    background: Literal["tilted", "flat"] = "tilted"
    window_sigmas: float = Field(default=3.0, ge=1.5, le=6.0)


class SublatticeSettings(_Model):
    projection: Literal["perovskite_001", "simple"] = "perovskite_001"
    oxygen: Literal["auto", "always", "never"] = "auto"


class CalibrationSettings(_Model):
    reference_material: str | None = None
    axis: Literal["a", "c", "mean"] = "mean"


class CellsSettings(_Model):
    """Per-cell descriptors (livequant.analysis.cells)."""

    reference: Literal["median", "material", "region"] = "median"
    reference_region_px: tuple[float, float, float, float] | None = None
    gpa: bool = True
    gpa_mask_sigma_fraction: float = Field(default=0.2, gt=0, le=0.35)
    min_snr_topology: float = Field(default=3.0, ge=0)
    max_wall_chi2: float = Field(default=5.0, gt=0)

    @model_validator(mode="after")
    def _check_reference_region(self) -> "CellsSettings":
        r = self.reference_region_px
        if self.reference == "region" and r is None:
            raise ValueError('reference = "region" needs reference_region_px = [x0, y0, x1, y1] '
                             "(pixels)")
        if r is not None and not (r[2] > r[0] and r[3] > r[1]):
            raise ValueError(f"reference_region_px must be [x0, y0, x1, y1] with x1 > x0 and "
                             f"y1 > y0, got {list(r)}")
        return self


class ScanDriftSettings(_Model):
    """Undo the in-frame distortion of a steady specimen drift (analysis.scan_drift)."""

    enabled: bool = True
    flyback_s: float = Field(default=0.0, ge=0, le=1.0)
    min_drift_pairs: int = Field(default=2, ge=1)


class PhysicsSettings(_Model):
    """Wall physics per frame (livequant.analysis.wallphysics): G-L numbers and roughness."""

    enabled: bool = True
    temperature_K: float = Field(default=298.0, gt=0, le=2000)
    roughness_min_rows: int = Field(default=12, ge=4)
    roughness_bootstrap: int = Field(default=100, ge=10, le=10_000)


class AnalysisSettings(_Model):
    lattice: LatticeSettings = LatticeSettings()
    detection: DetectionSettings = DetectionSettings()
    refine: RefineSettings = RefineSettings()
    sublattice: SublatticeSettings = SublatticeSettings()
    calibration: CalibrationSettings = CalibrationSettings()
    cells: CellsSettings = CellsSettings()
    scan_drift: ScanDriftSettings = ScanDriftSettings()
    material: str | None = None
    materials_file: str | None = None
    physics: PhysicsSettings = PhysicsSettings()


class DaemonSettings(_Model):
    """The live daemon (``livequant run``): ingest, worker pool, sockets, display.

    The number of analysis processes is the top-level ``workers`` key.
    """

    settle_time_s: float = Field(default=2.0, gt=0, le=3600)
    rescan_interval_s: float = Field(default=1.0, gt=0, le=3600)
    force_polling: bool = False
    max_in_flight: int = Field(default=0, ge=0, le=256)
    newest_first: bool = True
    intake_queue_size: int = Field(default=256, ge=1, le=100_000)
    host: str = "127.0.0.1"
    # socket security and limits (livequant/daemon/security.py)
    allow_remote: bool = False
    curve: bool = False
    curve_server_secret_key: str | None = None
    curve_authorized_clients: str | None = None
    max_message_mb: float = Field(default=2048.0, gt=0, le=65536)
    ingest_socket: bool = True
    ingest_port: int = Field(default=5601, ge=0, le=65535)
    events_port: int = Field(default=5602, ge=0, le=65535)
    commands_port: int = Field(default=5603, ge=0, le=65535)
    tick_s: float = Field(default=0.1, gt=0, le=5)
    heartbeat_s: float = Field(default=10.0, gt=0, le=3600)
    refresh_per_second: float = Field(default=4.0, ge=0.5, le=10)
    grace_s: float = Field(default=30.0, ge=0, le=3600)
    max_attempts: int = Field(default=3, ge=1, le=100)
    # Dask scheduler for the analysis (livequant/cluster.py): None = the local process pool
    # for `livequant run`, a LocalCluster for `livequant reprocess`
    scheduler: str | None = None


# ---------------------------------------------------------------- decision rules


class DomainWallRuleSettings(_Model):
    """Built-in rule ``domain_walls``: flags the tanh wall fit of the cells summary."""

    max_reduced_chi2: float = Field(default=10.0, gt=0)
    min_contrast_snr: float = Field(default=2.0, ge=0)
    contrast_half_snr: float = Field(default=4.0, gt=0)
    max_width_cells: float = Field(default=3.0, gt=0)
    refit_min_snr: float = Field(default=1.5, ge=0)
    band_cells: float = Field(default=3.0, gt=0)


class VortexRuleSettings(_Model):
    """Built-in rule ``vortex_cores``: winding numbers on loops of cells."""

    loop_cells: int = Field(default=4, ge=1, le=10)
    smooth_cells: int = Field(default=5, ge=1, le=9)
    min_snr: float = Field(default=2.0, ge=0)
    max_step_deg: float = Field(default=90.0, gt=0, le=180)
    min_loops: int = Field(default=2, ge=1)
    region_cells: float = Field(default=4.0, gt=0)
    max_flags: int = Field(default=20, ge=1)


class InterfaceRuleSettings(_Model):
    """Built-in rule ``interfaces``: a step along a lattice row profile."""

    descriptors: list[str] = ["a_pm", "b_pm", "ratio_b_a"]
    window_rows: int = Field(default=3, ge=1, le=20)
    min_significance: float = Field(default=8.0, gt=0)
    min_relative_step: float = Field(default=0.01, ge=0)
    band_cells: float = Field(default=2.0, gt=0)


class AnomalyRuleSettings(_Model):
    """Built-in rule ``anomalies``: robust score against the session's running statistics."""

    descriptors: list[str] = ["a_pm", "b_pm", "d_pm", "ratio_b_a"]
    k_cell: float = Field(default=2.5, gt=0)
    k_sigma: float = Field(default=6.0, gt=0)
    min_cells: int = Field(default=1, ge=1)
    min_session_cells: int = Field(default=500, ge=1)
    margin_cells: float = Field(default=1.0, ge=0)
    max_flags: int = Field(default=10, ge=1)


class FeatureTrackSettings(_Model):
    """Built-in rule ``feature_tracks`` and the tracker behind it (livequant.proposals.tracks)."""

    max_wall_shift_nm: float = Field(default=0.5, gt=0)
    min_significance: float = Field(default=3.0, ge=0)
    flag_cores: bool = True
    region_nm: float = Field(default=3.0, gt=0)
    match_distance_nm: float = Field(default=3.0, gt=0)
    max_angle_deg: float = Field(default=20.0, gt=0, le=90)
    core_merge_nm: float = Field(default=1.5, gt=0)
    core_match_nm: float = Field(default=2.0, gt=0)
    edge_margin_nm: float = Field(default=1.0, ge=0)
    vanish_frames: int = Field(default=2, ge=1)


class RulesSettings(_Model):
    """Decision rules (livequant.rules): which load, from where, and their thresholds."""

    enabled: list[str] = ["domain_walls", "vortex_cores", "interfaces", "anomalies",
                          "feature_tracks"]
    blocked: list[str] = []
    plugin_dirs: list[str] = []
    max_consecutive_failures: int = Field(default=5, ge=1, le=100_000)
    history: int = Field(default=500, ge=1, le=1_000_000)
    stats_max_cells: int = Field(default=50_000, ge=100, le=10_000_000)
    anomaly_attach_margin_cells: float = Field(default=2.0, ge=0, le=100)
    domain_walls: DomainWallRuleSettings = DomainWallRuleSettings()
    vortex_cores: VortexRuleSettings = VortexRuleSettings()
    interfaces: InterfaceRuleSettings = InterfaceRuleSettings()
    anomalies: AnomalyRuleSettings = AnomalyRuleSettings()
    feature_tracks: FeatureTrackSettings = FeatureTrackSettings()
    options: dict[str, dict[str, Any]] = {}
class ProposalSettings(_Model):
    """Flags -> proposed scan regions (livequant.proposals)."""

    enabled: bool = True
    min_score: float = Field(default=0.3, ge=0, le=1)
    margin_nm: float = Field(default=1.0, ge=0, le=1000)
    min_size_nm: float = Field(default=4.0, gt=0, le=5000)
    max_size_nm: float = Field(default=40.0, gt=0, le=5000)
    merge_overlap: float = Field(default=0.3, gt=0, le=1)
    visited_overlap: float = Field(default=0.5, gt=0, le=1)
    max_per_frame: int = Field(default=3, ge=0, le=1000)
    max_per_session: int = Field(default=50, ge=0, le=100_000)
    pixel_size_pm: float = Field(default=10.0, gt=0, le=100_000)
    dwell_time_us: float = Field(default=4.0, gt=0, le=1000)
    max_side_px: int = Field(default=2048, ge=64, le=8192)
    lead_time_s: float = Field(default=10.0, ge=0, le=3600)
    expire_after_s: float = Field(default=900.0, ge=0)
    auto_accept: bool = False
    #: probe current for the dose a proposal would deliver (display, accept); None = unknown
    beam_current_pa: float | None = Field(default=None, gt=0, le=1e6)
    dose_budget_e_per_a2: float | None = Field(default=None, gt=0)
    dose_map_cell_nm: float = Field(default=0.5, gt=0, le=100)
    drift_margin_sigma: float = Field(default=3.0, ge=0, le=20)
    auto_accept_min_drift_pairs: int = Field(default=2, ge=0, le=1000)


class DriftSettings(_Model):
    """Specimen drift from overlapping frames (livequant.proposals.drift)."""

    enabled: bool = True
    keep_frames: int = Field(default=8, ge=1, le=100)
    min_overlap_fraction: float = Field(default=0.3, gt=0, le=1)
    search_radius_nm: float = Field(default=5.0, gt=0, le=1000)
    min_search_radius_nm: float = Field(default=0.5, gt=0, le=1000)
    upsample_factor: int = Field(default=20, ge=1, le=100)
    ambiguity_ratio: float = Field(default=0.8, gt=0, le=1)
    memory_s: float = Field(default=600.0, gt=0)
    random_walk_nm_per_sqrt_s: float = Field(default=0.01, ge=0)
    prior_speed_nm_per_s: float = Field(default=0.02, gt=0)
    outlier_sigma: float = Field(default=4.0, gt=0)
    clock: Literal["wall", "frames"] = "wall"


class SeriesSettings(_Model):
    """Fast-scan series and orthogonal pairs (livequant.analysis.series, .orthogonal)."""

    enabled: bool = True
    nonrigid: bool = True
    max_jump_px: float = Field(default=10.0, gt=0, le=10_000)
    max_residual_chi2: float = Field(default=3.0, gt=0)
    max_residual_ratio: float = Field(default=1.5, gt=1)
    smooth_lines: float = Field(default=32.0, gt=0, le=100_000)
    smooth_px: float = Field(default=2.0, ge=0, le=20)
    iterations: int = Field(default=3, ge=1, le=50)
    min_members: int = Field(default=2, ge=1, le=10_000)
    analyse_every: int = Field(default=1, ge=1, le=10_000)
    max_series: int = Field(default=4, ge=1, le=100)
    reorder_s: float = Field(default=10.0, ge=0, le=3600)


class Settings(_Model):
    """Every setting of livequant, with its default."""

    frame_defaults: FrameDefaults = FrameDefaults()
    analysis: AnalysisSettings = AnalysisSettings()
    workers: int = Field(default=0, ge=0, le=64)
    daemon: DaemonSettings = DaemonSettings()
    rules: RulesSettings = RulesSettings()
    proposals: ProposalSettings = ProposalSettings()
    drift: DriftSettings = DriftSettings()
    series: SeriesSettings = SeriesSettings()


# ---------------------------------------------------------------- loading


def load_settings(
    config_file: str | os.PathLike | None = None,
    *,
    overrides: Mapping[str, Any] | None = None,
    environ: Mapping[str, str] | None = None,
    use_default_toml: bool = True,
) -> Settings:
    """Resolve settings from all sources.

    Parameters
    ----------
    config_file : path, optional
        A user TOML file (``--config``; else ``$LIVEQUANT_CONFIG`` if set).
    overrides : mapping, optional
        Dotted keys from the command line, e.g. ``{"frame_defaults.pixel_size_pm": 8.5}``.
    environ : mapping, optional
        Environment to read ``LIVEQUANT_*`` variables from (default ``os.environ``).

    Raises
    ------
    ConfigError
        With the key, the value given and what is allowed.
    """
    return validate_settings(settings_tree(config_file, overrides=overrides, environ=environ,
                                           use_default_toml=use_default_toml))


def validate_settings(tree: Mapping) -> Settings:
    try:
        return Settings.model_validate(tree)
    except ValidationError as exc:
        lines = []
        for err in exc.errors():
            key = ".".join(str(p) for p in err["loc"])
            if err["type"] == "extra_forbidden":
                lines.append(f"`{key}` is not a setting (misspelled?); see config/default.toml")
            else:
                lines.append(f"`{key}` = {err.get('input')!r}: {err['msg']}")
        raise ConfigError("invalid configuration:\n  " + "\n  ".join(lines)) from None


# ---------------------------------------------------------------- materials


class LandauCoefficients(_Model):
    """Landau-Devonshire coefficients of a material (``[NAME.landau]``), Haun's form.

    ``F = alpha1 P^2 + alpha11 P^4 + alpha111 P^6`` with ``alpha1 = alpha1_slope_m_per_F_K
    * (T - t0_K)``, SI units; ``livequant.analysis.landau`` converts them to its own
    convention (``alpha = 2 alpha1, beta = 4 alpha11, gamma = 6 alpha111``).
    """

    alpha1_slope_m_per_F_K: float = Field(gt=0)
    t0_K: float = Field(gt=0)
    alpha11: float
    alpha111: float = 0.0
    source: str
    status: str


class Material(_Model):
    """One entry of ``config/materials.toml``."""

    name: str
    a_pm: float = Field(gt=0)
    c_pm: float = Field(gt=0)
    z_a: int = Field(gt=0)
    z_b: int = Field(gt=0)
    born_a: float | None = None
    born_b: float | None = None
    born_o_par: float | None = None
    born_o_perp: float | None = None
    p_sign_b_vs_a: Literal[-1, 1] | None = None
    source: str = Field(min_length=1)
    status: str
    landau: LandauCoefficients | None = None

    @property
    def cell_volume_pm3(self) -> float:
        return self.a_pm * self.a_pm * self.c_pm


#: Said once per command when no material is set.
NO_MATERIAL_NOTE = ("no material given (--material NAME or analysis.material): polarization "
                    "(pol_* columns) is not computed and strain is against each frame's median "
                    "cell")

#: How to add a material, for error messages.
ADD_MATERIAL_HINT = (
    "to add one, write a TOML file with a table per material, e.g.\n"
    "    [MyFilm]\n"
    "    a_pm = 400.0\n    c_pm = 410.0\n    z_a = 82\n    z_b = 22\n"
    "    source = \"where the numbers come from (paper, table, your own measurement)\"\n"
    "  and give it with --materials FILE or the setting analysis.materials_file "
    "(keys: see config/materials.toml)")


def load_materials(path: str | os.PathLike | None = None, *,
                   user_file: str | os.PathLike | None = None) -> dict[str, Material]:
    """Read the material table; keys are the material names.

    Parameters
    ----------
    path : path, optional
        The table (default: the one shipped in ``config/materials.toml``).
    user_file : path, optional
        A user's own TOML table (``--materials FILE``, ``analysis.materials_file``),
        validated the same way; ``source`` is required for every entry and
        ``status`` defaults to ``"user file"``.  Its entries are added to the
        table and replace shipped entries of the same name.

    Raises
    ------
    ConfigError
        Naming the file, the material and the key that is wrong.
    """
    out = _read_material_table(Path(path) if path else MATERIALS_TOML, user=False)
    if user_file:
        out.update(_read_material_table(Path(user_file).expanduser(), user=True))
    return out


def _read_material_table(path: Path, *, user: bool) -> dict[str, Material]:
    try:
        raw = _read_toml(path)
    except ConfigError as exc:
        raise ConfigError(str(exc).replace("config file", "materials file")) from None
    out = {}
    for name, entry in raw.items():
        if not isinstance(entry, dict):
            raise ConfigError(f"{path}: `{name}` must be a table ([{name}]) of a material's "
                              f"numbers, got {entry!r}; {ADD_MATERIAL_HINT}")
        data = {"name": name, **entry}
        if user:
            data.setdefault("status", "user file")
        try:
            out[name] = Material.model_validate(data)
        except ValidationError as exc:
            problems = []
            for err in exc.errors():
                key = ".".join(str(p) for p in err["loc"])
                problems.append(f"`{key}` is required" if err["type"] == "missing" else
                                f"`{key}` = {err.get('input')!r}: {err['msg']}")
            raise ConfigError(f"{path}: material `{name}`: {'; '.join(problems)}") from None
    return out


def get_material(name: str, *, path: str | os.PathLike | None = None,
                 user_file: str | os.PathLike | None = None) -> Material:
    """One material of the table (shipped plus `user_file`), or a ConfigError saying how
    to add it."""
    table = load_materials(path, user_file=user_file)
    if name not in table:
        raise ConfigError(f"unknown material `{name}`; known: {', '.join(sorted(table))}; "
                          f"{ADD_MATERIAL_HINT}")
    return table[name]


def check_materials(settings: "Settings") -> None:
    """Fail early, with the known names, on a material setting that names no material."""
    a = settings.analysis
    for key, name in (("analysis.material", a.material),
                      ("analysis.calibration.reference_material",
                       a.calibration.reference_material)):
        if name:
            try:
                get_material(name, user_file=a.materials_file)
            except ConfigError as exc:
                raise ConfigError(f"`{key}`: {exc}") from None
