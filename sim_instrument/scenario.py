"""Scenario files: the virtual specimen and the instrument, described in TOML.

A scenario is validated once, with unknown keys forbidden, so that a typo in
a key fails loudly instead of silently building a different specimen.  Every
error names the file and the dotted key (``layers.2.polar.direction_deg``).

Coordinates are specimen coordinates in nanometres: ``x`` along the film
plane, ``y`` along the growth direction, the origin at the specimen centre.
"""

from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

try:  # Python >= 3.11
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10
    import tomli as tomllib  # type: ignore[no-redef]

__all__ = [
    "ScenarioError",
    "Scenario",
    "LayerSpec",
    "PolarSpec",
    "WallSpec",
    "VortexPairSpec",
    "DefectSpec",
    "VacancySpec",
    "RandomVacancySpec",
    "InstrumentSpec",
    "ProbeSpec",
    "DriftSpec",
    "DistortionSpec",
    "DetectorSpec",
    "SCENARIO_DIR",
    "load_scenario",
    "list_scenarios",
]

SCENARIO_DIR = Path(__file__).resolve().parent / "scenarios"

Pair = tuple[float, float]


class ScenarioError(ValueError):
    """A scenario that cannot be built: the message names the file and the key."""


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


# ---------------------------------------------------------------- specimen


class PolarSpec(_Strict):
    """Polar (ferroelectric) order of a layer.

    ``b_displacement_pm`` is the shift of the B column from the centre of its
    four A neighbours in a single domain; ``o_displacement_pm`` the shift of
    the pure O columns against the A sublattice, both along the local polar
    axis.  ``direction_deg`` is the direction of the B-site shift (from +x
    towards +y) before any wall acts.  Whether the polarization points along
    or against it is a property of the material (``p_sign_b_vs_a``).
    """

    b_displacement_pm: float = Field(ge=0, le=100)
    o_displacement_pm: float = Field(default=0.0, ge=-100, le=100)
    direction_deg: float = 90.0


class LayerSpec(_Strict):
    """One layer of the stack, from the bottom up.

    The layer reaches from the previous layer's ``y_max_nm`` (or the bottom of
    the specimen) to its own ``y_max_nm`` (``None``: the top).  The in-plane
    lattice parameter is that of the reference material everywhere (coherent
    growth); the out-of-plane one is the material's ``c_pm`` when the polar
    axis is closer to y, else its ``a_pm``.
    """

    material: str
    y_max_nm: float | None = None
    polar: PolarSpec | None = None
    tilt_deg: float = Field(default=0.0, ge=-20, le=20)


class WallSpec(_Strict):
    """A ferroelectric domain wall: a straight line through the polar layers.

    ``kind = "180"`` reverses the polar displacement across the wall,
    ``"90"`` rotates it by ``rotation_deg`` (+90 or -90).  The positive side is
    to the left of the wall direction ``angle_deg`` (the side the normal
    ``(-sin, cos)`` points to).  Profiles are ``tanh(s / half_width_nm)``.
    """

    kind: Literal["180", "90"]
    point_nm: Pair
    angle_deg: float
    half_width_nm: float = Field(gt=0, le=50)
    rotation_deg: Literal[90, -90] = 90
    #: A 180-degree wall may move: its point is ``point_nm + velocity_nm_per_s * t``
    #: (t = the simulated session clock at the middle of each frame).
    velocity_nm_per_s: Pair = (0.0, 0.0)

    @model_validator(mode="after")
    def _only_180_walls_move(self):
        if self.kind != "180" and any(self.velocity_nm_per_s):
            raise ValueError("only 180-degree walls may move (`velocity_nm_per_s`): a 90-degree "
                             "wall carries a lattice kink that is built once")
        return self


class VortexPairSpec(_Strict):
    """A polar vortex (winding +1) and antivortex (winding -1) pair."""

    vortex_nm: Pair
    antivortex_nm: Pair
    core_nm: float = Field(default=1.0, gt=0, le=20)
    #: The pair annihilates (both cores vanish, the domain is uniform) from this
    #: simulated session time on, seconds; None: it stays.
    annihilate_at_s: float | None = Field(default=None, ge=0)


class DefectSpec(_Strict):
    """A point defect with local chemical expansion.

    The displacement field is a regularised centre of dilatation,
    ``u = eps0 r0^2 (r - p) / (|r - p|^2 + r0^2)``, whose strain at the centre is
    ``eps0`` (= ``expansion_pct / 100``) in every direction.
    """

    point_nm: Pair
    expansion_pct: float = Field(ge=-10, le=10)
    radius_nm: float = Field(gt=0, le=20)
    vacancy_site: Literal["A", "B", "none"] = "none"


class VacancySpec(_Strict):
    """A column with missing atoms: the nearest column of ``site`` to ``point_nm``."""

    point_nm: Pair
    site: Literal["A", "B"]
    occupancy: float = Field(default=0.5, ge=0, lt=1)


class RandomVacancySpec(_Strict):
    """Columns with missing atoms spread at random (reproducible from ``seed``)."""

    fraction_a: float = Field(default=0.0, ge=0, le=0.2)
    fraction_b: float = Field(default=0.0, ge=0, le=0.2)
    occupancy: float = Field(default=0.7, ge=0, lt=1)


# ---------------------------------------------------------------- instrument


class ProbeSpec(_Strict):
    """Probe intensity: a Gaussian core plus an optional broad weak tail."""

    sigma_pm: float = Field(default=40.0, gt=1, le=500)
    tail_fraction: float = Field(default=0.0, ge=0, lt=0.5)
    tail_sigma_pm: float = Field(default=150.0, gt=1, le=2000)


class DriftSpec(_Strict):
    """Specimen drift on the stage: linear velocity plus a random walk."""

    velocity_nm_per_s: Pair = (0.012, 0.006)
    random_walk_nm_per_sqrt_s: float = Field(default=0.002, ge=0)


class DistortionSpec(_Strict):
    """Scan-generator imperfections."""

    line_jitter_pm: float = Field(default=0.0, ge=0, le=500)
    flyback_amplitude_pm: float = Field(default=0.0, ge=0, le=5000)
    flyback_time_us: float = Field(default=20.0, gt=0)
    flyback_s: float = Field(default=0.0, ge=0, le=1e-2, description="dead time per line, s")


class DetectorSpec(_Strict):
    """Detector response.

    HAADF: fraction of the beam scattered onto the detector is
    ``background_fraction + sum_k Q_k P(r - r_k)`` with the column cross-section
    ``Q_k = cross_section_pm2 * sum_atoms Z^exponent``.  ABF: the bright field
    level minus ``cross_section_pm2 * (Z^exponent of the column's cation,
    abf_partner_weight * Z_O^exponent for the O sharing a B column)``: on
    multislice ABF frames of SrTiO3 (abTEM, tests/data/multislice) the column
    depths are Sr : Ti-O : O = 2.0 : 1.6 : 1.0, which Z^0.45 of the heaviest
    atom reproduces (38^0.45 / 8^0.45 = 2.0, 22^0.45 / 8^0.45 = 1.6) and an
    additive sum does not (it makes Ti-O the deeper column).  Electron
    counts are Poisson, then ``gain`` and ``offset`` (counts) and Gaussian read
    noise (counts) are applied.
    """

    mode: Literal["HAADF", "ABF"] = "HAADF"
    haadf_exponent: float = Field(default=1.7, gt=0, le=2.5)
    haadf_cross_section_pm2: float = Field(default=1.0, gt=0)
    haadf_background_fraction: float = Field(default=0.02, ge=0, lt=1)
    abf_exponent: float = Field(default=0.45, gt=0, le=2)
    abf_partner_weight: float = Field(default=0.0, ge=0, le=1)
    abf_cross_section_pm2: float = Field(default=600.0, gt=0)
    abf_bright_fraction: float = Field(default=0.6, gt=0, le=1)
    gain: float = Field(default=1.0, gt=0)
    offset: float = Field(default=0.0, ge=0)
    read_noise: float = Field(default=0.0, ge=0)


class InstrumentSpec(_Strict):
    """Defaults for the scan engine; the command line may override them."""

    probe: ProbeSpec = ProbeSpec()
    drift: DriftSpec = DriftSpec()
    distortion: DistortionSpec = DistortionSpec()
    detector: DetectorSpec = DetectorSpec()
    beam_current_pa: float = Field(default=20.0, gt=0, le=2000)
    dwell_time_us: float = Field(default=2.0, gt=0, le=1000)


# ---------------------------------------------------------------- scenario


class Scenario(_Strict):
    """A whole scenario: specimen plus instrument defaults."""

    name: str
    description: str = ""
    size_nm: Pair = Field(description="extent along x and y, nm")
    reference_material: str
    interface_half_width_nm: float = Field(default=0.5, gt=0, le=20)
    seed: int = 0
    layers: list[LayerSpec] = Field(min_length=1)
    walls: list[WallSpec] = []
    vortex_pairs: list[VortexPairSpec] = []
    defects: list[DefectSpec] = []
    vacancies: list[VacancySpec] = []
    random_vacancies: RandomVacancySpec = RandomVacancySpec()
    instrument: InstrumentSpec = InstrumentSpec()

    @model_validator(mode="after")
    def _check_geometry(self):
        w, h = self.size_nm
        if not (w > 0 and h > 0 and math.isfinite(w) and math.isfinite(h)):
            raise ValueError(f"`size_nm` must be two positive lengths, got {self.size_nm}")
        tops = [layer.y_max_nm for layer in self.layers]
        for k, top in enumerate(tops[:-1]):
            if top is None:
                raise ValueError(f"`layers.{k}.y_max_nm` is required: only the last layer "
                                 "may extend to the top of the specimen")
        finite = [t for t in tops if t is not None]
        for k in range(1, len(finite)):
            if finite[k] <= finite[k - 1]:
                raise ValueError(f"`layers.{k}.y_max_nm` = {finite[k]} must be above the "
                                 f"layer below ({finite[k - 1]}); list layers bottom-up")
        if (self.walls or self.vortex_pairs) and not any(l.polar for l in self.layers):
            raise ValueError("`walls`/`vortex_pairs` need at least one layer with a "
                             "`polar` table")
        return self


def _format_errors(exc: ValidationError, where: str) -> str:
    lines = []
    for err in exc.errors():
        key = ".".join(str(p) for p in err["loc"]) or "(top level)"
        if err["type"] == "extra_forbidden":
            lines.append(f"`{key}` is not a scenario key (misspelled?); see "
                         "sim_instrument/README.md for the keys")
        elif err["type"] == "missing":
            lines.append(f"`{key}` is required but missing")
        else:
            msg = err["msg"].removeprefix("Value error, ")
            lines.append(f"`{key}` = {err.get('input')!r}: {msg}")
    return f"{where}: invalid scenario:\n  " + "\n  ".join(lines)


def list_scenarios() -> list[str]:
    """Names of the scenarios shipped in ``sim_instrument/scenarios``."""
    return sorted(p.stem for p in SCENARIO_DIR.glob("*.toml"))


def _resolve(path_or_name: str | os.PathLike) -> Path:
    # A bare name (no folder, no suffix) is a shipped scenario first: a folder
    # or file of that name in the working directory (say, a session folder
    # called `demo`) must never be taken for it.  A folder is never a scenario.
    text = os.fspath(path_or_name)
    p = Path(text)
    bare = p.suffix == "" and p.name == text and os.sep not in text and "/" not in text
    candidate = SCENARIO_DIR / f"{p.name}.toml"
    if bare and candidate.is_file():
        return candidate
    if p.is_dir():
        raise ScenarioError(f"{text!r} is a folder, not a scenario file: give a .toml file or "
                            f"one of the shipped scenarios ({', '.join(list_scenarios())})")
    if p.suffix == ".toml" or p.exists():
        return p
    raise ScenarioError(f"no scenario named {str(path_or_name)!r}: not a file, and not one of "
                        f"the shipped scenarios ({', '.join(list_scenarios())})")


def load_scenario(path_or_name: str | os.PathLike, *, materials=None) -> Scenario:
    """Read and validate a scenario file (a path, or the name of a shipped one).

    Parameters
    ----------
    path_or_name : str or path
        ``demo`` (a shipped scenario) or ``path/to/file.toml``.
    materials : dict, optional
        The material table (``livequant.config.load_materials()`` by default);
        every material named in the scenario must be in it.

    Raises
    ------
    ScenarioError
        Naming the file and the offending key.
    """
    path = _resolve(path_or_name)
    try:
        with open(path, "rb") as fh:
            raw = tomllib.load(fh)
    except FileNotFoundError:
        raise ScenarioError(f"scenario file {path} does not exist") from None
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(f"{path}: not valid TOML: {exc}") from None
    return scenario_from_dict(raw, where=str(path), materials=materials)


def scenario_from_dict(raw: dict, *, where: str = "scenario", materials=None) -> Scenario:
    """Validate an already-parsed scenario mapping (see :func:`load_scenario`)."""
    try:
        scenario = Scenario.model_validate(raw)
    except ValidationError as exc:
        raise ScenarioError(_format_errors(exc, where)) from None
    if materials is None:
        from livequant.config import load_materials

        materials = load_materials()
    named = [("reference_material", scenario.reference_material)]
    named += [(f"layers.{k}.material", l.material) for k, l in enumerate(scenario.layers)]
    for key, name in named:
        if name not in materials:
            raise ScenarioError(f"{where}: `{key}` = {name!r} is not in the material table; "
                                f"known: {', '.join(sorted(materials))}")
    return scenario
