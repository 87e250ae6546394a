"""The virtual specimen: a perovskite cross-section in physical coordinates.

The specimen is a perovskite lattice seen along [001], built lazily: nothing is
stored per column, every position is an analytic function of the cell index,
so a field of view anywhere on a specimen several hundred nanometres wide
costs only the columns inside it.

How a column position is formed
-------------------------------
1. Reference site on a cubic grid of the reference material's parameter
   ``a_ref``: ``r0 = ((i + fx) a_ref, (j + fy) a_ref)`` with ``(fx, fy)`` =
   ``(0, 0)`` for A, ``(1/2, 1/2)`` for B, ``(1/2, 0)`` for Oa, ``(0, 1/2)`` for
   Ob (the site convention of ``livequant.analysis.types.SUBLATTICES``).
2. A smooth, compatible displacement field ``u(r0)`` carries the elastic
   structure: every planar feature (a layer interface with a step of the
   out-of-plane parameter, a 90-degree wall with its change of tetragonal
   axis) is a *kink* ``u = b H(n.(r - p))`` whose gradient ``b (x) n`` switches on
   across the plane with a tanh profile, and every point defect adds a centre
   of dilatation.  A kink is compatible by construction (its gradient is rank
   one), so the lattice never tears.
3. Polar displacements of B and O columns follow a complex field
   ``z(r) = exp(i phi) * prod(wall factors) * prod(vortex factors)``.

Units: nanometres for positions, picometres for displacements (names say so).
Arrays of specimen positions are ``(N, 2)`` in ``(x, y)`` order; they are
physical coordinates, not pixels.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass

import numpy as np

from sim_instrument.scenario import (
    Scenario,
    ScenarioError,
    load_scenario,
    scenario_from_dict,
)

__all__ = ["Specimen", "SpecimenColumns", "SpecimenCells", "SITE_OFFSETS", "O_Z"]

#: Fractional offsets of each sublattice in the cell (see livequant SUBLATTICES).
SITE_OFFSETS = {"A": (0.0, 0.0), "B": (0.5, 0.5), "Oa": (0.5, 0.0), "Ob": (0.0, 0.5)}
O_Z = 8


@dataclass(frozen=True)
class SpecimenColumns:
    """True atomic columns in a region of the specimen.

    Attributes
    ----------
    xy_nm : (N, 2) float
        Position in specimen coordinates (x, y), nm.
    sublattice : (N,) str
        ``"A"``, ``"B"``, ``"Oa"`` or ``"Ob"``.
    ij : (N, 2) int
        Cell index along x and y.
    z : (N,) int
        Atomic number of the column's main atom (A or B cation, 8 for O).
    z_partner : (N,) int
        Atomic number of the second atom species in the column repeat (8 for
        the B-O columns of the [001] projection, 0 otherwise).
    occupancy : (N,) float
        Fraction of the main atoms present (1 = full column).
    layer : (N,) int
        Index of the layer the column belongs to.
    """

    xy_nm: np.ndarray
    sublattice: np.ndarray
    ij: np.ndarray
    z: np.ndarray
    z_partner: np.ndarray
    occupancy: np.ndarray
    layer: np.ndarray

    def __len__(self) -> int:
        return int(self.xy_nm.shape[0])

    def select(self, mask) -> "SpecimenColumns":
        mask = np.asarray(mask)
        return SpecimenColumns(**{k: getattr(self, k)[mask] for k in (
            "xy_nm", "sublattice", "ij", "z", "z_partner", "occupancy", "layer")})

    def scattering(self, exponent: float, *, partner_weight: float = 1.0) -> np.ndarray:
        """``occupancy * z**n + w * z_partner**n`` per column (Z-contrast rule of thumb;
        ``w = partner_weight``: 1 adds the B column's oxygen, 0 leaves it out)."""
        partner = np.where(self.z_partner > 0, self.z_partner.astype(float) ** exponent, 0.0)
        return self.occupancy * self.z.astype(float) ** exponent + partner_weight * partner


@dataclass(frozen=True)
class SpecimenCells:
    """Per-unit-cell truth in a region.

    Attributes
    ----------
    ij : (M, 2) int
        Cell index (the cell's A corner is at its lower-left).
    b_xy_nm : (M, 2) float
        Position of the cell's B column, nm.
    displacement_b_pm : (M, 2) float
        B column minus the mean of its four A neighbours, (x, y), pm: what an
        analysis of the image measures as the polar displacement.
    applied_b_pm, applied_o_pm : (M, 2) float
        The polar shift put on the B and O columns of the cell, (x, y), pm.
    polarization_dir : (M, 2) float
        Unit vector of the polarization (B shift times the material's
        ``p_sign_b_vs_a``; zero where there is no polar order).
    a_local_pm, c_local_pm : (M,) float
        Cell edge lengths along x and y measured between the A corners, pm.
    tilt_deg : (M,) float
        Octahedral rotation about [001] put on the O columns.
    layer : (M,) int
    """

    ij: np.ndarray
    b_xy_nm: np.ndarray
    displacement_b_pm: np.ndarray
    applied_b_pm: np.ndarray
    applied_o_pm: np.ndarray
    polarization_dir: np.ndarray
    a_local_pm: np.ndarray
    c_local_pm: np.ndarray
    tilt_deg: np.ndarray
    layer: np.ndarray

    def __len__(self) -> int:
        return int(self.ij.shape[0])


def _logcosh(x):
    ax = np.abs(x)
    return ax + np.log1p(np.exp(-2.0 * ax)) - math.log(2.0)


def _ramp(s, w):
    """Smooth ramp H(s): 0 for s << -w, s for s >> w, H' = (1 + tanh(s/w)) / 2."""
    return 0.5 * (s + w * _logcosh(s / w) + w * math.log(2.0))


def _hash_uniform(i, j, salt: int, seed: int) -> np.ndarray:
    """Deterministic uniform [0, 1) per integer pair (splitmix64 finaliser)."""
    with np.errstate(over="ignore"):
        x = (np.asarray(i, dtype=np.uint64) * np.uint64(0x9E3779B97F4A7C15)
             ^ (np.asarray(j, dtype=np.uint64) + np.uint64(0x632BE59BD9B4E019))
             * np.uint64(0xBF58476D1CE4E5B9))
        x ^= np.uint64((seed * 1_000_003 + salt) & 0xFFFFFFFFFFFFFFFF)
        x ^= x >> np.uint64(30)
        x *= np.uint64(0xBF58476D1CE4E5B9)
        x ^= x >> np.uint64(27)
        x *= np.uint64(0x94D049BB133111EB)
        x ^= x >> np.uint64(31)
    return (x >> np.uint64(11)).astype(np.float64) / float(1 << 53)


@dataclass(frozen=True)
class _Layer:
    index: int
    material: str
    y_lo_nm: float
    y_hi_nm: float
    z_a: int
    z_b: int
    ay_pm: float           # out-of-plane parameter in this layer
    tetragonality: float   # (c - a) / a_ref, for 90-degree walls
    polar: bool
    b_disp_pm: float
    o_disp_pm: float
    direction_rad: float
    tilt_deg: float
    p_sign: int


@dataclass(frozen=True)
class _Kink:
    normal: np.ndarray     # unit (x, y)
    point_nm: np.ndarray
    half_width_nm: float
    b: np.ndarray          # displacement gradient jump is b (x) n
    layer: int | None      # masked to this layer, or None for everywhere


class Specimen:
    """A virtual perovskite specimen built from a :class:`Scenario`.

    Build one with :meth:`from_scenario`; then ask for the true columns and
    cells of any region with :meth:`columns_in` and :meth:`cells_in`.

    Examples
    --------
    >>> spec = Specimen.from_scenario("demo")
    >>> cols = spec.columns_in((-2.0, 2.0, 20.0, 24.0))
    >>> sorted(set(cols.sublattice.tolist()))
    ['A', 'B', 'Oa', 'Ob']
    """

    def __init__(self, scenario: Scenario, *, materials=None):
        if materials is None:
            from livequant.config import load_materials

            materials = load_materials()
        self.scenario = scenario
        self.materials = materials
        ref = materials[scenario.reference_material]
        self.a_ref_nm = ref.a_pm / 1000.0
        w, h = scenario.size_nm
        self.bounds_nm = (-w / 2, w / 2, -h / 2, h / 2)
        self.time_s = 0.0
        self.layers = self._build_layers()
        self.kinks = self._build_kinks()
        self._vacancy_keys = self._build_vacancies()

    def set_time(self, t_s: float) -> None:
        """Move the specimen's time-varying features to session time `t_s` (seconds).

        180-degree walls with a ``velocity_nm_per_s`` move; vortex pairs with an
        ``annihilate_at_s`` vanish from then on.  The scan engine calls this with
        the middle of each frame (the state is held for the whole frame).
        """
        if not math.isfinite(t_s):
            raise ValueError(f"`t_s` must be finite, got {t_s!r}")
        self.time_s = float(t_s)

    def _wall_point(self, wall) -> np.ndarray:
        """A point on `wall` in reference coordinates at the specimen's time."""
        return np.asarray(wall.point_nm, float) + self.time_s * np.asarray(wall.velocity_nm_per_s,
                                                                           float)

    def _active_pairs(self):
        return [p for p in self.scenario.vortex_pairs
                if p.annihilate_at_s is None or self.time_s < p.annihilate_at_s]

    # ------------------------------------------------------------ building

    @classmethod
    def from_scenario(cls, scenario: "Scenario | str | os.PathLike | dict", *,
                      materials=None) -> "Specimen":
        """Build from a :class:`Scenario`, a scenario name or path, or a dict."""
        if isinstance(scenario, Scenario):
            sc = scenario
        elif isinstance(scenario, dict):
            sc = scenario_from_dict(scenario, materials=materials)
        else:
            sc = load_scenario(scenario, materials=materials)
        return cls(sc, materials=materials)

    def _build_layers(self) -> list[_Layer]:
        out = []
        y_lo = self.bounds_nm[2]
        for k, spec in enumerate(self.scenario.layers):
            mat = self.materials[spec.material]
            y_hi = spec.y_max_nm if spec.y_max_nm is not None else math.inf
            polar = spec.polar is not None
            direction = math.radians(spec.polar.direction_deg) if polar else math.pi / 2
            # The long (c) axis lies along the polar axis; coherent growth
            # keeps the in-plane parameter at a_ref, so only the
            # out-of-plane parameter changes from layer to layer.
            along_y = abs(math.sin(direction)) >= abs(math.cos(direction))
            ay = mat.c_pm if (along_y or not polar) else mat.a_pm
            out.append(_Layer(
                index=k, material=spec.material, y_lo_nm=y_lo, y_hi_nm=y_hi,
                z_a=mat.z_a, z_b=mat.z_b, ay_pm=ay,
                tetragonality=(mat.c_pm - mat.a_pm) / (self.a_ref_nm * 1000.0),
                polar=polar,
                b_disp_pm=spec.polar.b_displacement_pm if polar else 0.0,
                o_disp_pm=spec.polar.o_displacement_pm if polar else 0.0,
                direction_rad=direction, tilt_deg=spec.tilt_deg,
                p_sign=int(mat.p_sign_b_vs_a or 1)))
            y_lo = y_hi
        return out

    def _build_kinks(self) -> list[_Kink]:
        sc = self.scenario
        a_ref_pm = self.a_ref_nm * 1000.0
        kinks = []
        w_if = sc.interface_half_width_nm
        # The layer at the bottom sets the reference: its out-of-plane
        # parameter is applied as a uniform strain from the specimen centre.
        self._base_strain_y = self.layers[0].ay_pm / a_ref_pm - 1.0
        for lower, upper in zip(self.layers[:-1], self.layers[1:]):
            step = (upper.ay_pm - lower.ay_pm) / a_ref_pm
            if step != 0.0:
                kinks.append(_Kink(normal=np.array([0.0, 1.0]),
                                   point_nm=np.array([0.0, lower.y_hi_nm]),
                                   half_width_nm=w_if, b=np.array([0.0, step]), layer=None))
        for k, wall in enumerate(sc.walls):
            if wall.kind != "90":
                continue
            n = self._wall_normal(wall)
            p = np.asarray(wall.point_nm, float)
            # The polar axis on either side of this wall, with every wall and
            # the vortices acting, sampled a few widths off the wall.
            sides = np.stack([p - 6.0 * wall.half_width_nm * n, p + 6.0 * wall.half_width_nm * n])
            for layer in self.layers:
                if not layer.polar or layer.tetragonality == 0.0:
                    continue
                z_minus, z_plus = self._polar_phase(sides, layer)
                if min(abs(z_minus), abs(z_plus)) < 1e-6:
                    continue
                d1 = np.array([z_minus.real, z_minus.imag]) / abs(z_minus)
                d2 = np.array([z_plus.real, z_plus.imag]) / abs(z_plus)
                m = layer.tetragonality * (np.outer(d2, d2) - np.outer(d1, d1))
                nmn = float(n @ m @ n)
                if abs(nmn) > 0.05 * abs(layer.tetragonality):
                    angle = math.degrees(math.atan2(d1[1], d1[0]))
                    raise ScenarioError(
                        f"scenario {sc.name!r}: `walls.{k}.angle_deg` = {wall.angle_deg}: a "
                        f"90-degree wall must run at 45 degrees to the polar axis it meets "
                        f"(here {angle:.0f} deg) to be uncharged and compatible; use "
                        f"{(angle + 45) % 180:.0f} or {(angle - 45) % 180:.0f}")
                # Rank-one connection: sym(b (x) n) = m when n.m.n = 0.
                b = 2.0 * (m @ n) - nmn * n
                # The displacement b H(s) is zero on the negative side, so the rigid
                # offset that a band of rotated cells brings (b times the band width)
                # falls on the positive side of the last wall: orient walls so that
                # is the smaller part of the film.
                kinks.append(_Kink(normal=n, point_nm=p, half_width_nm=wall.half_width_nm,
                                   b=b, layer=layer.index))
        return kinks

    def _build_vacancies(self) -> dict:
        keys: dict[str, dict[tuple[int, int], float]] = {"A": {}, "B": {}}
        for vac in self.scenario.vacancies:
            ij = self._nearest_cell(np.asarray(vac.point_nm, float), vac.site)
            keys[vac.site][ij] = vac.occupancy
        for d in self.scenario.defects:
            if d.vacancy_site != "none":
                ij = self._nearest_cell(np.asarray(d.point_nm, float), d.vacancy_site)
                keys[d.vacancy_site][ij] = 0.5
        return keys

    def _nearest_cell(self, p_nm: np.ndarray, site: str) -> tuple[int, int]:
        r0 = p_nm.copy()
        for _ in range(4):  # fixed point of r0 + u(r0) = p
            r0 = p_nm - self.displacement_nm(r0[None, :])[0]
        fx, fy = SITE_OFFSETS[site]
        return (int(round(r0[0] / self.a_ref_nm - fx)), int(round(r0[1] / self.a_ref_nm - fy)))

    @staticmethod
    def _wall_normal(wall) -> np.ndarray:
        t = math.radians(wall.angle_deg)
        return np.array([-math.sin(t), math.cos(t)])

    # ------------------------------------------------------------ fields

    def layer_index(self, y_nm) -> np.ndarray:
        """Layer index of reference height(s) `y_nm` (bottom layer is 0)."""
        tops = np.array([l.y_hi_nm for l in self.layers[:-1]])
        return np.searchsorted(tops, np.asarray(y_nm, float), side="right")

    def _layer_mask(self, y_nm, layer: _Layer) -> np.ndarray:
        w = self.scenario.interface_half_width_nm
        lo = 0.5 * (1 + np.tanh((y_nm - layer.y_lo_nm) / w)) if math.isfinite(layer.y_lo_nm) \
            and layer.index > 0 else 1.0
        hi = 0.5 * (1 - np.tanh((y_nm - layer.y_hi_nm) / w)) if math.isfinite(layer.y_hi_nm) \
            else 1.0
        return lo * hi

    def displacement_nm(self, r0_nm: np.ndarray) -> np.ndarray:
        """Elastic displacement ``u`` (N, 2) nm at reference positions (N, 2) nm."""
        r0 = np.asarray(r0_nm, float)
        u = np.zeros_like(r0)
        u[:, 1] += self._base_strain_y * r0[:, 1]
        for kink in self.kinks:
            s = (r0 - kink.point_nm) @ kink.normal
            h = _ramp(s, kink.half_width_nm)
            if kink.layer is not None:
                h = h * self._layer_mask(r0[:, 1], self.layers[kink.layer])
            u += h[:, None] * kink.b[None, :]
        for d in self.scenario.defects:
            dr = r0 - np.asarray(d.point_nm, float)
            r2 = np.einsum("ij,ij->i", dr, dr)
            u += (d.expansion_pct / 100.0) * d.radius_nm**2 * dr / (r2 + d.radius_nm**2)[:, None]
        return u

    def _polar_phase(self, r_nm: np.ndarray, layer: _Layer, upto_wall: int | None = None):
        """Complex polar field (unit length in a uniform domain) for one layer."""
        z = np.full(r_nm.shape[0], complex(math.cos(layer.direction_rad),
                                           math.sin(layer.direction_rad)))
        walls = self.scenario.walls if upto_wall is None else self.scenario.walls[:upto_wall]
        for wall in walls:
            s = (r_nm - self._wall_point(wall)) @ self._wall_normal(wall)
            if wall.kind == "180":
                z = z * (-np.tanh(s / wall.half_width_nm))
            else:
                f = 0.5 * (1 + np.tanh(s / wall.half_width_nm))
                z = z * ((1 - f) + f * np.exp(1j * math.radians(wall.rotation_deg)))
        if upto_wall is None:
            for pair in self._active_pairs():
                d1 = r_nm - np.asarray(pair.vortex_nm, float)
                d2 = r_nm - np.asarray(pair.antivortex_nm, float)
                e1 = d1[:, 0] + 1j * d1[:, 1]
                e2 = d2[:, 0] + 1j * d2[:, 1]
                r1, r2 = np.abs(e1), np.abs(e2)
                # e1 * conj(e2) / (|e1||e2|) winds +1 round the vortex, -1 round
                # the antivortex and tends to 1 far away, so the domain outside
                # is left as it was; tanh cores keep the field finite.
                with np.errstate(invalid="ignore", divide="ignore"):
                    phase = np.where((r1 > 0) & (r2 > 0), e1 * np.conj(e2) / (r1 * r2), 0.0)
                z = z * phase * np.tanh(r1 / pair.core_nm) * np.tanh(r2 / pair.core_nm)
        return z

    def polar_field(self, r_nm: np.ndarray, layer_idx: np.ndarray) -> np.ndarray:
        """Complex polar field per point, zero outside polar layers."""
        r_nm = np.asarray(r_nm, float)
        z = np.zeros(r_nm.shape[0], complex)
        for layer in self.layers:
            if not layer.polar:
                continue
            sel = layer_idx == layer.index
            if sel.any():
                z[sel] = self._polar_phase(r_nm[sel], layer)
        return z

    # ------------------------------------------------------------ queries

    def _cell_range(self, region):
        x0, x1, y0, y1 = (float(v) for v in region)
        if not (x1 > x0 and y1 > y0):
            raise ValueError(f"`region` must be (x_min, x_max, y_min, y_max) with max > min, "
                             f"got {region}")
        # The displacement field can carry a cell many nanometres from its
        # reference site (strain integrated over the film), so search the
        # reference grid around r - u(r) with a margin for the spread of u.
        gx, gy = np.meshgrid(np.linspace(x0, x1, 5), np.linspace(y0, y1, 5))
        probe = np.column_stack([gx.ravel(), gy.ravel()])
        r0 = probe.copy()
        for _ in range(3):
            r0 = probe - self.displacement_nm(r0)
        pad = 2.0 * self.a_ref_nm
        lo = r0.min(axis=0) - pad
        hi = r0.max(axis=0) + pad
        i = np.arange(math.floor(lo[0] / self.a_ref_nm), math.ceil(hi[0] / self.a_ref_nm) + 1)
        j = np.arange(math.floor(lo[1] / self.a_ref_nm), math.ceil(hi[1] / self.a_ref_nm) + 1)
        if i.size * j.size > 20_000_000:
            raise ValueError(f"`region` {region} holds {i.size * j.size} cells; ask for a "
                             "smaller field of view")
        ii, jj = np.meshgrid(i, j, indexing="xy")
        return ii.ravel(), jj.ravel()

    def _site_positions(self, ii, jj, site: str):
        """Reference and displaced positions (N, 2) nm of one sublattice for cells (ii, jj)."""
        fx, fy = SITE_OFFSETS[site]
        r0 = np.column_stack([(ii + fx) * self.a_ref_nm, (jj + fy) * self.a_ref_nm])
        pos = r0 + self.displacement_nm(r0)
        return r0, pos

    def _columns_and_cells(self, region, want_cells: bool):
        ii, jj = self._cell_range(region)
        a = self.a_ref_nm
        b_r0 = np.column_stack([(ii + 0.5) * a, (jj + 0.5) * a])
        cell_layer = self.layer_index(b_r0[:, 1])
        z = self.polar_field(b_r0, cell_layer)
        b_disp = np.array([l.b_disp_pm for l in self.layers])[cell_layer]
        o_disp = np.array([l.o_disp_pm for l in self.layers])[cell_layer]
        shift_b_pm = np.column_stack([z.real, z.imag]) * b_disp[:, None]
        shift_o_pm = np.column_stack([z.real, z.imag]) * o_disp[:, None]

        pos = {}
        r0s = {}
        for site in ("A", "B", "Oa", "Ob"):
            r0s[site], pos[site] = self._site_positions(ii, jj, site)
        pos["B"] = pos["B"] + shift_b_pm / 1000.0
        # Octahedral rotation about [001], antiphase from cell to cell: the O
        # on a B-B bond moves perpendicular to it by (a/2) tan(phi)
        # (CHECK-VALUES section 8, projected-tilt geometry).
        parity = np.where((ii + jj) % 2 == 0, 1.0, -1.0)
        for site, axis, sign in (("Oa", 0, 1.0), ("Ob", 1, -1.0)):
            lay = self.layer_index(r0s[site][:, 1])
            tilt = np.array([l.tilt_deg for l in self.layers])[lay]
            delta_nm = 0.5 * a * np.tan(np.radians(tilt))
            p = pos[site] + shift_o_pm / 1000.0
            p[:, axis] += sign * parity * delta_nm
            pos[site] = p

        x0, x1, y0, y1 = region
        # Beyond the specimen edges there is vacuum (by reference position).
        bx0, bx1, by0, by1 = self.bounds_nm
        cell_in = ((b_r0[:, 0] >= bx0) & (b_r0[:, 0] < bx1)
                   & (b_r0[:, 1] >= by0) & (b_r0[:, 1] < by1))
        za = np.array([l.z_a for l in self.layers])
        zb = np.array([l.z_b for l in self.layers])
        parts = []
        for site in ("A", "B", "Oa", "Ob"):
            p = pos[site]
            inside = (cell_in & (p[:, 0] >= x0) & (p[:, 0] < x1)
                      & (p[:, 1] >= y0) & (p[:, 1] < y1))
            lay = self.layer_index(r0s[site][:, 1])
            if site == "A":
                zz, zp = za[lay], np.zeros_like(lay)
            elif site == "B":
                zz, zp = zb[lay], np.full_like(lay, O_Z)
            else:
                zz, zp = np.full_like(lay, O_Z), np.zeros_like(lay)
            occ = self._occupancy(ii, jj, site)
            parts.append(dict(xy_nm=p[inside], sublattice=np.full(int(inside.sum()), site),
                              ij=np.column_stack([ii, jj])[inside], z=zz[inside],
                              z_partner=zp[inside], occupancy=occ[inside], layer=lay[inside]))
        cols = SpecimenColumns(**{k: np.concatenate([p[k] for p in parts]) for k in parts[0]})
        if not want_cells:
            return cols, None

        corners = []
        for di, dj in ((0, 0), (1, 0), (0, 1), (1, 1)):
            r0 = np.column_stack([(ii + di) * a, (jj + dj) * a])
            corners.append(r0 + self.displacement_nm(r0))
        a_mean = sum(corners) / 4.0
        a_local = 0.5 * (np.hypot(*(corners[1] - corners[0]).T)
                         + np.hypot(*(corners[3] - corners[2]).T)) * 1000.0
        c_local = 0.5 * (np.hypot(*(corners[2] - corners[0]).T)
                         + np.hypot(*(corners[3] - corners[1]).T)) * 1000.0
        inside = (cell_in & (pos["B"][:, 0] >= x0) & (pos["B"][:, 0] < x1)
                  & (pos["B"][:, 1] >= y0) & (pos["B"][:, 1] < y1))
        psign = np.array([l.p_sign for l in self.layers])[cell_layer]
        norm = np.hypot(*shift_b_pm.T)
        with np.errstate(invalid="ignore", divide="ignore"):
            pdir = np.where(norm[:, None] > 1e-9, shift_b_pm / norm[:, None], 0.0)
        pdir = pdir * psign[:, None]
        tilt = np.array([l.tilt_deg for l in self.layers])[cell_layer]
        cells = SpecimenCells(
            ij=np.column_stack([ii, jj])[inside], b_xy_nm=pos["B"][inside],
            displacement_b_pm=((pos["B"] - a_mean) * 1000.0)[inside],
            applied_b_pm=shift_b_pm[inside], applied_o_pm=shift_o_pm[inside],
            polarization_dir=pdir[inside], a_local_pm=a_local[inside],
            c_local_pm=c_local[inside], tilt_deg=tilt[inside], layer=cell_layer[inside])
        return cols, cells

    def _occupancy(self, ii, jj, site: str) -> np.ndarray:
        occ = np.ones(ii.shape[0])
        if site not in ("A", "B"):
            return occ
        rv = self.scenario.random_vacancies
        frac = rv.fraction_a if site == "A" else rv.fraction_b
        if frac > 0:
            u = _hash_uniform(ii, jj, salt=1 if site == "A" else 2, seed=self.scenario.seed)
            occ = np.where(u < frac, rv.occupancy, occ)
        for (vi, vj), value in self._vacancy_keys[site].items():
            occ = np.where((ii == vi) & (jj == vj), value, occ)
        return occ

    def columns_in(self, region) -> SpecimenColumns:
        """True columns whose position lies in ``region = (x_min, x_max, y_min, y_max)`` nm."""
        return self._columns_and_cells(region, want_cells=False)[0]

    def cells_in(self, region) -> SpecimenCells:
        """Per-cell truth for cells whose B column lies in `region` (nm)."""
        return self._columns_and_cells(region, want_cells=True)[1]

    # ------------------------------------------------------------ features

    def walls_truth(self) -> list[dict]:
        """The domain walls: kind, a point on the (displaced) wall and its direction."""
        out = []
        for k, wall in enumerate(self.scenario.walls):
            p = self._wall_point(wall)
            p_disp = p + self.displacement_nm(p[None, :])[0]
            t = math.radians(wall.angle_deg)
            out.append({"index": k, "kind": wall.kind, "point_nm": p_disp.tolist(),
                        "direction": [math.cos(t), math.sin(t)],
                        "half_width_nm": wall.half_width_nm,
                        "velocity_nm_per_s": list(wall.velocity_nm_per_s),
                        "time_s": self.time_s})
        return out

    def vortex_truth(self) -> list[dict]:
        """Vortex and antivortex cores (displaced positions) with their winding numbers."""
        out = []
        for k, pair in enumerate(self.scenario.vortex_pairs):
            if pair.annihilate_at_s is not None and self.time_s >= pair.annihilate_at_s:
                continue  # annihilated by now
            for key, winding in (("vortex_nm", 1), ("antivortex_nm", -1)):
                p = np.asarray(getattr(pair, key), float)
                p_disp = p + self.displacement_nm(p[None, :])[0]
                out.append({"pair": k, "winding": winding, "xy_nm": p_disp.tolist(),
                            "core_nm": pair.core_nm})
        return out

    def interfaces_truth(self) -> list[dict]:
        """Layer interfaces: reference height and the materials either side."""
        out = []
        for lo, hi in zip(self.layers[:-1], self.layers[1:]):
            p = np.array([[0.0, lo.y_hi_nm]])
            out.append({"y_reference_nm": lo.y_hi_nm,
                        "y_nm_at_x0": float((p + self.displacement_nm(p))[0, 1]),
                        "below": lo.material, "above": hi.material,
                        "half_width_nm": self.scenario.interface_half_width_nm})
        return out
