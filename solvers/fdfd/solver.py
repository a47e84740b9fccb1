"""Solve the FDFD system; the differentiable (JAX) form with an adjoint gradient.

Forward: ``A(eps) h = b`` with A from :mod:`solvers.fdfd.operator` and b the TFSF
line of :mod:`solvers.fdfd.sources`; the returned Hy is ``h`` plus the incident wave
outside the total-field region (so it is the total field everywhere), and Ex, Ez
follow from Hy by the discrete curl.

Adjoint (T. W. Hughes et al., Opt. Express 25, 15414, 2017, for the method): with
JAX's convention that a cotangent g of a complex output y pairs as ``Re(g . dy)``,
and u = 1/eps_x, w = 1/eps_z,

    g_h   = g_hy + Dzb^T (a_x u g_ex) / (i w eps0) - Dxb^T (a_z w g_ez) / (i w eps0)
    lam   = A^-T g_h                         (one transpose solve, same factors)
    g_u   = a_x (Dzb Hy) g_ex / (i w eps0) - c_x (Dzb h) (Dzf^T lam)
    g_w   = -a_z (Dxb Hy) g_ez / (i w eps0) - c_z (Dxb h) (Dxf^T lam)
    g_eps_x = -u^2 g_u,  g_eps_z = -w^2 g_w   (real part for real permittivity)

The factorization is cached per problem (frequency, Bloch vector, grid, PML,
source) and permittivity, so the gradient costs one extra triangular solve pair.
"""

from __future__ import annotations

import hashlib
import math
import warnings
from collections import OrderedDict
from dataclasses import dataclass
from functools import lru_cache

import jax
import jax.numpy as jnp
import numpy as np

from solvers.fdfd.fields import Fields
from solvers.fdfd.linsolve import DEFAULT_BACKEND, factorize
from solvers.fdfd.operator import Operator, build_operator
from solvers.fdfd.sources import SourceTerms, tfsf_source
from solvers.fdfd.specs import EPS0, FdfdProblem

WARN_CELLS_PER_WAVELENGTH = 20.0
MIN_CELLS_PER_WAVELENGTH = 8.0
MIN_PML_WAVELENGTHS = 0.5
_SOURCE_MEDIUM_RTOL = 1e-9


class ResolutionWarning(UserWarning):
    """Fewer than WARN_CELLS_PER_WAVELENGTH cells per wavelength in the densest material."""


@dataclass(frozen=True)
class _System:
    op: Operator
    src: SourceTerms


@lru_cache(maxsize=4)
def _system(problem: FdfdProblem) -> _System:
    op = build_operator(problem)
    return _System(op=op, src=tfsf_source(problem, op.cx))


def check_inputs(problem: FdfdProblem, eps_x, eps_z, force: bool = False) -> None:
    """Validate shapes, finiteness, resolution, PML thickness and the source medium.

    Raises ValueError; warns (ResolutionWarning) below 20 cells per wavelength and
    refuses below 8 unless ``force``.
    """
    g, pml = problem.grid, problem.pml
    for name, e in (("eps_x", eps_x), ("eps_z", eps_z)):
        if np.shape(e) != g.shape:
            raise ValueError(f"{name} has shape {np.shape(e)}, grid needs {g.shape}")
        if not np.all(np.isfinite(e)):
            raise ValueError(f"{name} contains non-finite values")
        if np.any(e == 0):
            raise ValueError(f"{name} contains zeros")
    lam0 = problem.wavelength
    n_max = math.sqrt(max(np.max(np.abs(eps_x)), np.max(np.abs(eps_z)), 1.0))
    cpw = lam0 / n_max / max(g.dx, g.dz)
    if cpw < MIN_CELLS_PER_WAVELENGTH and not force:
        raise ValueError(
            f"only {cpw:.1f} cells per wavelength in the densest material (n={n_max:.3g}); "
            f"need >= {MIN_CELLS_PER_WAVELENGTH:g} (pass force=True to override)"
        )
    if cpw < WARN_CELLS_PER_WAVELENGTH:
        warnings.warn(
            f"{cpw:.1f} cells per wavelength in the densest material (n={n_max:.3g}); "
            f"results are inaccurate below {WARN_CELLS_PER_WAVELENGTH:g}",
            ResolutionWarning, stacklevel=3,
        )
    # PML thickness against the longest wavelength found inside the layer
    nz_p, nx_p = pml.cells_z, pml.cells_x
    zsl = np.r_[0:nz_p, g.nz - nz_p:g.nz]
    layers = [(nz_p * g.dz, eps_x[:, zsl], "z")]
    if nx_p:
        xsl = np.r_[0:nx_p, g.nx - nx_p:g.nx]
        layers.append((nx_p * g.dx, eps_z[xsl, :], "x"))
    for thick, e, axis in layers:
        n_min = math.sqrt(max(float(np.min(np.abs(e))), 1e-30))
        if thick < (1.0 - 1e-9) * MIN_PML_WAVELENGTHS * lam0 / n_min:
            raise ValueError(
                f"PML along {axis} is {thick:.3g} m thick, less than half the wavelength "
                f"{lam0 / n_min:.3g} m in the layer"
            )
    kb = problem.source_node
    e_inc = complex(problem.source.eps_incidence)
    lo, hi = (0, g.nx) if pml.periodic_x else (nx_p, g.nx - nx_p)
    near = np.concatenate([eps_x[lo:hi, kb - 1:kb + 2].ravel(),
                           eps_z[lo:hi, kb - 1:kb + 1].ravel()])
    if np.any(np.abs(near - e_inc) > _SOURCE_MEDIUM_RTOL * abs(e_inc)):
        raise ValueError(
            f"the medium at the source line (node {kb}) must be homogeneous with "
            f"eps_incidence={e_inc}"
        )


def _key(eps_x, eps_z) -> bytes:
    h = hashlib.blake2b(digest_size=16)
    for e in (eps_x, eps_z):
        a = np.ascontiguousarray(e)
        h.update(str(a.dtype).encode())
        h.update(a.tobytes())
    return h.digest()


class _Engine:
    """Forward and adjoint solves of one problem with a small factorization cache."""

    def __init__(self, problem: FdfdProblem, backend: str, cache_size: int = 2):
        self.problem = problem
        self.sys = _system(problem)
        self.backend = backend
        self.cache_size = cache_size
        self._cache: OrderedDict = OrderedDict()
        self.n_factor = 0

    def factorization(self, eps_x, eps_z):
        k = _key(eps_x, eps_z)
        if k in self._cache:
            self._cache.move_to_end(k)
            return self._cache[k]
        fac = factorize(self.sys.op.matrix(eps_x, eps_z), self.backend)
        self.n_factor += 1
        self._cache[k] = fac
        while len(self._cache) > self.cache_size:
            self._cache.popitem(last=False)
        return fac

    def forward(self, eps_x, eps_z, force=False):
        check_inputs(self.problem, eps_x, eps_z, force)
        op, src = self.sys.op, self.sys.src
        fac = self.factorization(eps_x, eps_z)
        h = fac.solve(src.rhs).reshape(op.shape)
        hy = h.copy()
        hy[:, src.add_rows] += src.add_hy
        ex, ez = op.e_from_h(hy, eps_x, eps_z)
        return ex, ez, hy

    def adjoint(self, eps_x, eps_z, hy, g_ex, g_ez, g_hy):
        op, src = self.sys.op, self.sys.src
        shape = op.shape
        iwe = 1j * op.omega * EPS0
        u, w = 1.0 / eps_x, 1.0 / eps_z
        h = hy.copy()
        h[:, src.add_rows] -= src.add_hy
        gh = (g_hy.ravel() + op.dzb.T @ (op.ax * u * g_ex / iwe).ravel()
              - op.dxb.T @ (op.az * w * g_ez / iwe).ravel())
        lam = self.factorization(eps_x, eps_z).solve(gh, trans=True)
        dzb_hy = (op.dzb @ hy.ravel()).reshape(shape)
        dxb_hy = (op.dxb @ hy.ravel()).reshape(shape)
        dzb_h = (op.dzb @ h.ravel()).reshape(shape)
        dxb_h = (op.dxb @ h.ravel()).reshape(shape)
        g_u = op.ax * dzb_hy * g_ex / iwe - op.cx * dzb_h * (op.dzf.T @ lam).reshape(shape)
        g_w = -op.az * dxb_hy * g_ez / iwe - op.cz * dxb_h * (op.dxf.T @ lam).reshape(shape)
        return -(u**2) * g_u, -(w**2) * g_w


def solve(problem: FdfdProblem, eps_x, eps_z, *, force: bool = False,
          backend: str = DEFAULT_BACKEND) -> Fields:
    """Fields of ``problem`` for permittivity ``eps_x`` (Ex points), ``eps_z`` (Ez points).

    Args:
        problem: grid, angular frequency (rad/s), PML, source, Bloch k_x.
        eps_x, eps_z: relative permittivity arrays of shape (nx, nz), real or complex
            (Im > 0 is loss with exp(-i omega t)).
        force: solve even below 8 cells per wavelength.
        backend: name of a sparse direct solver (see :mod:`solvers.fdfd.linsolve`).
    Returns:
        :class:`Fields` with the total Ex, Ez (V/m) and Hy (A/m).
    """
    eps_x = np.asarray(eps_x)
    eps_z = np.asarray(eps_z)
    ex, ez, hy = _Engine(problem, backend, cache_size=1).forward(eps_x, eps_z, force)
    return Fields(ex=ex, ez=ez, hy=hy, grid=problem.grid, omega=problem.omega,
                  bloch_kx=problem.kx_bloch, periodic_x=problem.pml.periodic_x,
                  problem=problem)


def field_solver(problem: FdfdProblem, *, force: bool = False,
                 backend: str = DEFAULT_BACKEND, cache_size: int = 2):
    """A JAX function ``(eps_x, eps_z) -> (ex, ez, hy)`` with an adjoint gradient.

    Works under ``jax.jit``, ``jax.grad`` and ``jax.vmap`` (sequentially); the
    solves run on the host through ``jax.pure_callback``.  The gradient of any real
    objective of the fields costs one transpose solve with the cached factors.
    Input checks on values (finiteness, resolution) run inside the callback; a
    failure surfaces as the runtime error JAX raises around the ValueError.
    The returned function has an attribute ``engine`` (factor count ``n_factor``).
    """
    engine = _Engine(problem, backend, cache_size=cache_size)
    shape = problem.grid.shape
    cplx = jax.ShapeDtypeStruct(shape, jnp.complex128)

    def _check_shapes(eps_x, eps_z):
        for name, e in (("eps_x", eps_x), ("eps_z", eps_z)):
            if tuple(e.shape) != shape:
                raise ValueError(f"{name} has shape {tuple(e.shape)}, grid needs {shape}")

    def _fwd_host(eps_x, eps_z):
        return engine.forward(np.asarray(eps_x), np.asarray(eps_z), force)

    def _call_forward(eps_x, eps_z):
        return jax.pure_callback(_fwd_host, (cplx, cplx, cplx), eps_x, eps_z,
                                 vmap_method="sequential")

    @jax.custom_vjp
    def fields(eps_x, eps_z):
        return _call_forward(eps_x, eps_z)

    def fields_fwd(eps_x, eps_z):
        out = _call_forward(eps_x, eps_z)
        return out, (eps_x, eps_z, out[2])

    def fields_bwd(res, cts):
        eps_x, eps_z, hy = res
        g_ex, g_ez, g_hy = cts
        dt = (jax.ShapeDtypeStruct(shape, eps_x.dtype), jax.ShapeDtypeStruct(shape, eps_z.dtype))

        def _bwd_host(ex_, ez_, hy_, a, b, c):
            gx, gz = engine.adjoint(np.asarray(ex_), np.asarray(ez_), np.asarray(hy_),
                                    np.asarray(a), np.asarray(b), np.asarray(c))
            out = []
            for gr, ref in ((gx, ex_), (gz, ez_)):
                out.append(gr if np.iscomplexobj(ref) else np.real(gr).astype(ref.dtype))
            return tuple(out)

        return jax.pure_callback(_bwd_host, dt, eps_x, eps_z, hy, g_ex, g_ez, g_hy,
                                 vmap_method="sequential")

    fields.defvjp(fields_fwd, fields_bwd)

    def solve_fields(eps_x, eps_z):
        eps_x, eps_z = jnp.asarray(eps_x), jnp.asarray(eps_z)
        _check_shapes(eps_x, eps_z)
        if not jnp.issubdtype(eps_x.dtype, jnp.complexfloating):
            eps_x = eps_x.astype(jnp.float64)
        if not jnp.issubdtype(eps_z.dtype, jnp.complexfloating):
            eps_z = eps_z.astype(jnp.float64)
        return fields(eps_x, eps_z)

    solve_fields.engine = engine
    return solve_fields
