"""Free-form density regions: filter, projection, robust designs, permittivity.

A :class:`DensityPatch` is a rectangle of the (x, z) cross-section inside any sample
family.  Its design pixels ARE the FDFD grid cells it covers (no second design grid:
one density value per cell centre, so no interpolation error and an exact adjoint of
the placement).  The density ``rho`` in [0, 1] goes through small pure functions that
compose (each JAX-traceable, float64):

    rho --density_filter--> rho_tilde --threshold_projection(beta, eta)--> rho_bar
        --density_to_eps--> eps at cell centres --place_eps--> (eps_x, eps_z)

and, for a minimum length scale, :func:`robust_triple` gives the eroded, nominal and
dilated designs (thresholds 0.5 + d_eta, 0.5, 0.5 - d_eta) of one filtered field, to
be optimized together (worst case).  :func:`beta_schedule` is the continuation of the
projection sharpness.  Methods:

* density filter with a cone (linear hat) kernel: B. Bourdin, "Filters in topology
  optimization", IJNME 50, 2143 (2001); T. E. Bruns & D. A. Tortorelli, "Topology
  optimization of non-linear elastic structures and compliant mechanisms", CMAME 190,
  3443 (2001);
* threshold projection and robust eroded/dilated designs: F. Wang, B. S. Lazarov &
  O. Sigmund, "On projection methods, convergence and robust formulations in topology
  optimization", Struct. Multidisc. Optim. 43, 767 (2011);
* length scale of the robust formulation: X. Qian & O. Sigmund, CMAME 253, 237 (2013)
  (see :func:`robust_length_scale`);
* measure of non-discreteness: O. Sigmund, Struct. Multidisc. Optim. 33, 401 (2007).

Caveat: on non-periodic region edges the filter is renormalized over the pixels
inside, so within one filter radius of such an edge the robust length scale is not
guaranteed (pad the region by R with fixed material if that matters).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import jax

jax.config.update("jax_enable_x64", True)   # densities, eps and gradients in float64

import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402
from jax.scipy.signal import convolve2d  # noqa: E402

from solvers.grid import Grid  # noqa: E402


# ---------------------------------------------------------------------------------
# region
# ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class DensityPatch:
    """A free-form rectangle ``[x_min, x_max] x [z_min, z_max]`` (m) of two materials.

    ``eps_void`` where the density is 0, ``eps_solid`` where it is 1.
    ``periodic_x``: the region spans the whole Bloch period, so the filter wraps
    along x (checked by :func:`region_cells`).
    """

    x_min_m: float
    x_max_m: float
    z_min_m: float
    z_max_m: float
    eps_solid: complex
    eps_void: complex = 1.0
    periodic_x: bool = False

    def __post_init__(self):
        if not (self.x_max_m > self.x_min_m and self.z_max_m > self.z_min_m):
            raise ValueError("design region needs x_max > x_min and z_max > z_min, got "
                             f"x [{self.x_min_m}, {self.x_max_m}], "
                             f"z [{self.z_min_m}, {self.z_max_m}]")


@dataclass(frozen=True)
class RegionCells:
    """Grid cells ``[i0, i1) x [k0, k1)`` of a design region (the design pixels)."""

    i0: int
    i1: int
    k0: int
    k1: int
    periodic_x: bool

    @property
    def shape(self) -> tuple[int, int]:
        return (self.i1 - self.i0, self.k1 - self.k0)


def region_cells(region: DensityPatch, grid: Grid) -> RegionCells:
    """The grid cells whose centres lie inside the region.

    Raises ValueError if the region covers no cell or leaves the grid, or if
    ``periodic_x`` is asked for a region narrower than the grid's period.
    """
    xc, zc = grid.x_centres(), grid.z_centres()
    ix = np.nonzero((xc >= region.x_min_m) & (xc <= region.x_max_m))[0]
    kz = np.nonzero((zc >= region.z_min_m) & (zc <= region.z_max_m))[0]
    if ix.size == 0 or kz.size == 0:
        raise ValueError("design region covers no grid cell centre")
    cells = RegionCells(int(ix[0]), int(ix[-1]) + 1, int(kz[0]), int(kz[-1]) + 1,
                        region.periodic_x)
    if region.periodic_x and cells.shape[0] != grid.nx:
        raise ValueError(f"a periodic design region must span the whole period "
                         f"({grid.nx} cells); it covers {cells.shape[0]}")
    return cells


# ---------------------------------------------------------------------------------
# filter
# ---------------------------------------------------------------------------------
def conic_kernel(radius_m: float, dx: float, dz: float) -> np.ndarray:
    """Unnormalized cone weights ``w = max(0, R - |d|)`` on pixel offsets ``(i dx, k dz)``.

    Shape ``(2 mx + 1, 2 mz + 1)`` with ``mx = floor(R/dx)``; a radius below one pixel
    gives the identity ``[[1]]`` (Bourdin 2001; Bruns & Tortorelli 2001).
    """
    if radius_m <= 0:
        raise ValueError(f"filter radius must be positive, got {radius_m}")
    mx, mz = int(math.floor(radius_m / dx)), int(math.floor(radius_m / dz))
    i = np.arange(-mx, mx + 1)[:, None] * dx
    k = np.arange(-mz, mz + 1)[None, :] * dz
    w = np.maximum(0.0, radius_m - np.hypot(i, k))
    return w / w.max()


def density_filter(rho: jnp.ndarray, radius_m: float, dx: float, dz: float, *,
                 periodic_x: bool = False) -> jnp.ndarray:
    """Density filter ``rho~_j = sum_i w_ij rho_i / sum_i w_ij`` with a cone kernel.

    ``w_ij = max(0, R - |x_i - x_j|)`` over the pixels of the region (Bourdin 2001;
    Bruns & Tortorelli 2001).  Along x the region wraps when ``periodic_x``; elsewhere
    the sum runs over pixels inside the region only and the weights are renormalized
    there, so a constant density is preserved everywhere, edges included.  Linear in
    ``rho``; JAX-traceable.

    Args:
      rho: (nx, nz) densities at cell centres.
      radius_m: filter radius R (m).
      dx, dz: pixel size (m).
      periodic_x: wrap along x (region spans the Bloch period).
    Returns:
      (nx, nz) filtered densities.
    """
    rho = jnp.asarray(rho, dtype=float)
    w = conic_kernel(radius_m, dx, dz)
    mx, mz = w.shape[0] // 2, w.shape[1] // 2
    norm = _filter_norm(rho.shape, w, periodic_x)
    padded = _pad_xz(rho, mx, mz, periodic_x)
    return convolve2d(padded, jnp.asarray(w), mode="valid") / norm


def _pad_xz(a, mx: int, mz: int, periodic_x: bool):
    a = jnp.pad(a, ((mx, mx), (0, 0)), mode="wrap" if periodic_x else "constant")
    return jnp.pad(a, ((0, 0), (mz, mz)), mode="constant")


def _filter_norm(shape, w: np.ndarray, periodic_x: bool) -> np.ndarray:
    # the sum of the weights that fall inside the region, per output pixel
    from scipy.signal import convolve2d as np_convolve2d

    mx, mz = w.shape[0] // 2, w.shape[1] // 2
    ones = np.ones(shape)
    ones = np.pad(ones, ((mx, mx), (0, 0)), mode="wrap" if periodic_x else "constant")
    ones = np.pad(ones, ((0, 0), (mz, mz)), mode="constant")
    return np_convolve2d(ones, w, mode="valid")


# ---------------------------------------------------------------------------------
# projection and continuation
# ---------------------------------------------------------------------------------
def threshold_projection(rho_tilde: jnp.ndarray, beta, eta=0.5) -> jnp.ndarray:
    """Smoothed Heaviside threshold projection (Wang, Lazarov & Sigmund 2011, eq. 8)::

        rho_bar = (tanh(beta eta) + tanh(beta (rho~ - eta)))
                  / (tanh(beta eta) + tanh(beta (1 - eta)))

    maps 0 -> 0, 1 -> 1, tends to ``rho~`` as beta -> 0 and to the step at ``eta``
    as beta -> inf.  ``beta = math.inf`` (a Python float) returns the step itself
    (1 above ``eta``, 0 below, 1/2 at ``eta``).  ``beta`` may be traced.
    """
    rho_tilde = jnp.asarray(rho_tilde, dtype=float)
    if isinstance(beta, (int, float)) and math.isinf(beta):
        return 0.5 * (1.0 + jnp.sign(rho_tilde - eta))
    num = jnp.tanh(beta * eta) + jnp.tanh(beta * (rho_tilde - eta))
    den = jnp.tanh(beta * eta) + jnp.tanh(beta * (1.0 - eta))
    return num / den


def beta_schedule(beta0: float = 1.0, *, every: int = 20, factor: float = 2.0,
                  beta_max: float = 64.0):
    """Continuation of the projection sharpness: ``beta(n) = min(beta0 factor^(n // every),
    beta_max)`` for iteration ``n`` (common practice, e.g. Wang, Lazarov & Sigmund 2011
    section 5, who double beta at intervals).  Returns a function of ``n`` (int or traced
    integer), in the style of an optax schedule.
    """
    if beta0 <= 0 or factor < 1 or every < 1 or beta_max < beta0:
        raise ValueError("beta_schedule needs beta0 > 0, factor >= 1, every >= 1, "
                         f"beta_max >= beta0; got {beta0}, {factor}, {every}, {beta_max}")

    def schedule(n):
        return jnp.minimum(beta0 * factor ** (jnp.asarray(n) // every), beta_max)

    return schedule


def robust_thresholds(delta_eta: float) -> tuple[float, float, float]:
    """``(eta_eroded, eta_nominal, eta_dilated) = (0.5 + d, 0.5, 0.5 - d)`` for
    ``0 < d < 0.5`` (Wang, Lazarov & Sigmund 2011)."""
    if not 0.0 < delta_eta < 0.5:
        raise ValueError(f"delta_eta must be in (0, 0.5), got {delta_eta}")
    return 0.5 + delta_eta, 0.5, 0.5 - delta_eta


def robust_triple(rho_tilde: jnp.ndarray, beta, delta_eta: float) -> jnp.ndarray:
    """Eroded, nominal and dilated projections of one filtered field, stacked on axis 0.

    Optimizing the worst of the three (Wang, Lazarov & Sigmund 2011) makes solid
    features of the nominal design survive erosion and its gaps survive dilation,
    which imposes the minimum lengths of :func:`robust_length_scale`.
    """
    return jnp.stack([threshold_projection(rho_tilde, beta, eta)
                      for eta in robust_thresholds(delta_eta)])


def robust_length_scale(radius_m: float, delta_eta: float, *, kernel: str = "2d") -> float:
    """Minimum solid (= void) size of the nominal design, for thresholds ``0.5 +/- d``.

    The 1D argument of Qian & Sigmund (CMAME 253, 237, 2013): the smallest solid that
    survives the eroded threshold ``eta_e`` is a raw bar whose filtered peak just
    reaches ``eta_e``; the width of the same filtered bump above ``eta_i = 0.5`` is the
    smallest solid of the nominal design.  By symmetry the same holds for gaps with
    ``eta_i - eta_d``.

    ``kernel="1d"``: the normalized 1D cone of radius R; worked out here in closed form
    (our derivation: bar half-width ``a = R (1 - sqrt(1 - eta_e))``, filtered bump
    ``eta_e - (x/R)^2`` for ``|x| <= a``)::

        b / R = 2 sqrt(eta_e - 1/2)          for eta_e <= 3/4
        b / R = 2 (1 - sqrt(1 - eta_e))      for eta_e >= 3/4     (b = 2a)

    (``b = R`` at ``eta_e = 0.75``, the value commonly quoted -- from memory).

    ``kernel="2d"`` (default, what :func:`density_filter` applies): a straight bar sees
    the 2D cone integrated along the bar, ``k(x) = (R h - x^2 ln((R + h)/|x|)) / (pi R^3
    / 3)`` with ``h = sqrt(R^2 - x^2)``; same argument, solved numerically.  About 6 %
    below the 1D value at ``d = 0.25``.
    """
    eta_e, eta_i, _ = robust_thresholds(delta_eta)
    if kernel == "1d":
        if eta_e <= 0.75:
            return 2.0 * radius_m * math.sqrt(eta_e - eta_i)
        return 2.0 * radius_m * (1.0 - math.sqrt(1.0 - eta_e))
    if kernel != "2d":
        raise ValueError(f"kernel must be '1d' or '2d', got {kernel!r}")
    return radius_m * _bar_length_2d(eta_e, eta_i)


def _line_cone(x: float) -> float:
    """The unit 2D cone integrated along y, normalized to unit area (R = 1)."""
    x = abs(x)
    if x >= 1.0:
        return 0.0
    h = math.sqrt(1.0 - x * x)
    tail = x * x * math.log((1.0 + h) / x) if x > 0 else 0.0
    return (h - tail) / (math.pi / 3.0)


def _bar_length_2d(eta_e: float, eta_i: float) -> float:
    from scipy.integrate import quad
    from scipy.optimize import brentq

    def cdf(t):
        inner = quad(_line_cone, 0.0, min(abs(t), 1.0), epsabs=1e-13)[0]
        return 0.5 + math.copysign(inner, t)

    def bump(s, a):
        return cdf(s + a) - cdf(s - a)

    a = brentq(lambda a: bump(0.0, a) - eta_e, 0.0, 1.0, xtol=1e-13)
    return 2.0 * brentq(lambda s: bump(s, a) - eta_i, 0.0, a + 1.0, xtol=1e-13)


def filter_radius_for_length(min_length_m: float, delta_eta: float = 0.25, *,
                             kernel: str = "2d") -> float:
    """Filter radius ``R`` for which :func:`robust_length_scale` equals ``min_length_m``."""
    return min_length_m / robust_length_scale(1.0, delta_eta, kernel=kernel)


# ---------------------------------------------------------------------------------
# permittivity
# ---------------------------------------------------------------------------------
def density_to_eps(rho_bar: jnp.ndarray, eps_void, eps_solid) -> jnp.ndarray:
    """Linear interpolation ``eps = eps_void + rho_bar (eps_solid - eps_void)``."""
    return eps_void + jnp.asarray(rho_bar) * (eps_solid - eps_void)


def place_eps(eps_x: jnp.ndarray, eps_z: jnp.ndarray, eps_cells: jnp.ndarray,
              cells: RegionCells) -> tuple[jnp.ndarray, jnp.ndarray]:
    """Put cell-centred ``eps_cells`` into a family's ``(eps_x, eps_z)`` Yee arrays.

    Staggering of solvers/grid.py: ``Ex[i, k]`` sits on the face between cells
    ``(i, k-1)`` and ``(i, k)``, ``Ez[i, k]`` between ``(i-1, k)`` and ``(i, k)``.  Each
    face takes the arithmetic mean of the permittivities on its two sides (for both
    components the face between the two cells is parallel to the field component,
    the case where the arithmetic mean is the exact layered average; Farjadpour et
    al., Opt. Lett. 31, 2972, 2006).  On a face of the region's border the outer side
    is the family's value one face further out (the cell just outside the region; the
    border face itself may already average across a family interface lying on it).
    Faces strictly inside are fully replaced.
    Linear in ``eps_cells``; JAX-traceable.
    """
    i0, i1, k0, k1 = cells.i0, cells.i1, cells.k0, cells.k1
    nx, nz = eps_x.shape
    e = jnp.asarray(eps_cells)
    dtype = jnp.result_type(eps_x, e)
    ex = jnp.asarray(eps_x, dtype=dtype)
    ez = jnp.asarray(eps_z, dtype=dtype)
    # Ex: faces k0 .. k1 (k1 is the bottom face of the cell above the region)
    inner = 0.5 * (e[:, :-1] + e[:, 1:])
    ex = ex.at[i0:i1, k0 + 1:k1].set(inner)
    below = ex[i0:i1, k0 - 1] if k0 >= 1 else ex[i0:i1, k0]
    above = ex[i0:i1, k1 + 1] if k1 + 1 < nz else ex[i0:i1, min(k1, nz - 1)]
    ex = ex.at[i0:i1, k0].set(0.5 * (e[:, 0] + below))
    if k1 < nz:
        ex = ex.at[i0:i1, k1].set(0.5 * (e[:, -1] + above))
    # Ez: faces i0 .. i1
    if cells.periodic_x:
        ez = ez.at[:, k0:k1].set(0.5 * (e + jnp.roll(e, 1, axis=0)))
    else:
        ez = ez.at[i0 + 1:i1, k0:k1].set(0.5 * (e[:-1] + e[1:]))
        left = ez[i0 - 1, k0:k1] if i0 >= 1 else ez[i0, k0:k1]
        right = ez[i1 + 1, k0:k1] if i1 + 1 < nx else ez[min(i1, nx - 1), k0:k1]
        ez = ez.at[i0, k0:k1].set(0.5 * (e[0] + left))
        if i1 < nx:
            ez = ez.at[i1, k0:k1].set(0.5 * (e[-1] + right))
    return ex, ez


# ---------------------------------------------------------------------------------
# measures
# ---------------------------------------------------------------------------------
def grayness(rho_bar: jnp.ndarray) -> jnp.ndarray:
    """Measure of non-discreteness ``mean(4 rho (1 - rho))``: 0 for a black-and-white
    design, 1 for all-gray 0.5 (O. Sigmund, Struct. Multidisc. Optim. 33, 401, 2007)."""
    rho_bar = jnp.asarray(rho_bar)
    return jnp.mean(4.0 * rho_bar * (1.0 - rho_bar))


def binarize(rho_bar, threshold: float = 0.5) -> np.ndarray:
    """Boolean solid mask ``rho_bar > threshold`` (for the pixel design-rule check)."""
    return np.asarray(rho_bar) > threshold


# ---------------------------------------------------------------------------------
# parametrizations: design variables -> region pattern
# ---------------------------------------------------------------------------------
UPPER_MODES = ("independent", "mirrored", "shifted")


def slab_counts(rows: int, slabs: int) -> tuple[int, ...]:
    """Rows per slab when ``rows`` grid rows are split into ``slabs`` stacked slabs
    (bottom first; nearly equal, the lower slabs one row larger when it does not divide).
    """
    if not 1 <= slabs <= rows:
        raise ValueError(f"cannot split {rows} grid rows into {slabs} etch steps "
                         "(each step needs at least one grid row)")
    return tuple(len(a) for a in np.array_split(np.arange(rows), slabs))


@dataclass(frozen=True)
class Parametrization:
    """How the design variables become the region's pattern (``shape``).

    The pattern is ``(nx, rows)`` cells of one region, or ``(nx, 2 rows)`` when a
    second region (the upper side of a two-sided structure) follows it along axis 1.

    * ``slabs = None``: one variable per cell (a 2D density; wafer-plane top views);
    * ``slabs = k``: the region is k stacked slabs and each slab has one variable per
      pixel column, extruded through the slab's rows (vertical sidewalls: what one
      lithography and etch step per slab makes).  The filter then acts along x only.
    * ``upper``: ``None`` (one region); ``"independent"`` (the upper region has its own
      variables); ``"mirrored"`` (the upper region is the lower one mirrored in z:
      ``pattern_upper[:, k] = pattern_lower[:, rows - 1 - k]``); ``"shifted"``
      (mirrored, then rolled by ``roll`` cells along x, periodic).

    Every map is linear and JAX-traceable, so gradients reach the variables.
    """

    nx: int
    rows: int
    slabs: int | None = None
    upper: str | None = None
    roll: int = 0

    def __post_init__(self):
        if self.slabs is not None:
            slab_counts(self.rows, self.slabs)
        if self.upper is not None and self.upper not in UPPER_MODES:
            raise ValueError(f"upper must be one of {UPPER_MODES} or None, got {self.upper!r}")

    @property
    def raw_rows(self) -> int:
        return self.slabs or self.rows

    @property
    def raw_shape(self) -> tuple[int, int]:
        """Shape of the design variables."""
        return (self.nx, self.raw_rows * (2 if self.upper == "independent" else 1))

    @property
    def shape(self) -> tuple[int, int]:
        """Shape of the region pattern (region cells)."""
        return (self.nx, self.rows * (2 if self.upper else 1))

    def _raw_parts(self, raw):
        n = self.raw_rows
        return [raw[:, :n]] + ([raw[:, n:2 * n]] if self.upper == "independent" else [])

    def filter(self, raw, radius_m: float, dx: float, dz: float, *, periodic_x: bool):
        """:func:`density_filter` of each part (along x only for slabs)."""
        if self.slabs is not None:
            dz = 4.0 * radius_m + dx          # one kernel row: no smoothing across slabs
        parts = [density_filter(p, radius_m, dx, dz, periodic_x=periodic_x)
                 for p in self._raw_parts(jnp.asarray(raw, dtype=float))]
        return jnp.concatenate(parts, axis=1) if len(parts) > 1 else parts[0]

    def _extrude(self, part):
        if self.slabs is None:
            return part
        counts = np.asarray(slab_counts(self.rows, self.slabs))
        return jnp.repeat(part, counts, axis=1, total_repeat_length=self.rows)

    def expand(self, raw):
        """Design variables (``raw_shape``) -> region pattern (``shape``)."""
        raw = jnp.asarray(raw)
        parts = [self._extrude(p) for p in self._raw_parts(raw)]
        lower = parts[0]
        if self.upper is None:
            return lower
        if self.upper == "independent":
            upper = parts[1]
        else:
            upper = jnp.flip(lower, axis=1)
            if self.upper == "shifted":
                upper = jnp.roll(upper, self.roll, axis=0)
        return jnp.concatenate([lower, upper], axis=1)

    def reduce(self, pattern) -> np.ndarray:
        """A region pattern -> the design variables that come closest (slab means;
        the lower region for mirrored/shifted uppers): the start of a design."""
        pattern = np.asarray(pattern, dtype=float)
        parts = [pattern[:, :self.rows]]
        if self.upper == "independent":
            parts.append(pattern[:, self.rows:2 * self.rows])
        out = []
        for p in parts:
            if self.slabs is None:
                out.append(p)
                continue
            edges = np.cumsum((0,) + slab_counts(self.rows, self.slabs))
            out.append(np.stack([p[:, a:b].mean(axis=1) for a, b in zip(edges, edges[1:])],
                                axis=1))
        return np.concatenate(out, axis=1)
