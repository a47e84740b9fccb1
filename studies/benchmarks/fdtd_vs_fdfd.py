"""Benchmark: the FDFD workhorse against an independent time-domain solver (Meep).

Scenario (our own): a fused-silica tooth grating for a 100 kV beam and an 800 nm laser,
phase-matched in first order (period = beta lambda = 438.6 nm), teeth 400 nm tall at 50 %
duty cycle on a silica substrate, lit at normal incidence from the substrate side.  The
electron passes 60 nm above the teeth.

Both solvers get the same grid spacing and physical region; FDFD puts its PML inside the
grid, Meep outside.  We compare Ex along the electron path, the one-period coupling
integral I_1 computed by the project's coupling code from each solver's samples, and
Hy on a vertical line through a gap between teeth.

    .venv/bin/python studies/benchmarks/fdtd_vs_fdfd.py [--cells-per-period 44] [--plot out.png]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy import constants as sc

from solvers.coupling import periodic_cell_integral
from solvers.fdfd import FdfdProblem, PlaneWave, Pml, eps_from_fine, solve
from solvers.fdtd import FdtdPolygon, FdtdProblem, run_fdtd
from solvers.grid import Grid

UM = 1e-6


def silica_eps(wavelength_m: float) -> float:
    """Fused silica, Sellmeier fit of I. H. Malitson, J. Opt. Soc. Am. 55, 1205 (1965)."""
    lam2 = (wavelength_m / UM) ** 2
    b = (0.6961663, 0.4079426, 0.8974794)
    c = (0.0684043**2, 0.1162414**2, 9.896161**2)
    return 1 + sum(bi * lam2 / (lam2 - ci) for bi, ci in zip(b, c))


def beta_of(voltage_v: float) -> float:
    gamma = 1 + sc.e * voltage_v / (sc.m_e * sc.c**2)
    return float(np.sqrt(1 - 1 / gamma**2))


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cells-per-period", type=int, default=44)
    ap.add_argument("--plot", default=None, help="write a PNG of |Ex| along the path here")
    args = ap.parse_args(argv)

    lam, volt = 0.8 * UM, 100e3
    beta = beta_of(volt)
    period = beta * lam
    eps_s = silica_eps(lam)
    height, duty, gap = 0.4 * UM, 0.5, 0.06 * UM
    omega = 2 * np.pi * sc.c / lam
    v = beta * sc.c

    nx = args.cells_per_period
    dx = period / nx
    n_pml = int(np.ceil(0.5 * UM / dx))
    below, above = 0.6 * UM, 0.8 * UM  # physical region: substrate depth, space above teeth
    n_phys = int(round((below + height + above) / dx))
    z_phys0 = -round(below / dx) * dx
    grid = Grid(nx=nx, nz=n_phys + 2 * n_pml, dx=dx, dz=dx, x0=0.0, z0=z_phys0 - n_pml * dx)
    tooth = (0.5 * (1 - duty) * period, 0.5 * (1 + duty) * period)
    z_e = height + gap

    # --- FDFD: supersampled map, anisotropic averaging
    s = 4
    xf = grid.x0 + (np.arange(s * nx) + 0.5) * dx / s
    zf = grid.z0 + (np.arange(s * grid.nz) + 0.5) * dx / s
    X, Z = np.meshgrid(xf, zf, indexing="ij")
    inside = (Z < 0) | ((Z < height) & (X > tooth[0]) & (X < tooth[1]))
    eps_fine = np.where(inside, eps_s, 1.0)
    eps_x, eps_z = (np.asarray(a) for a in eps_from_fine(eps_fine, s))
    prob = FdfdProblem(grid=grid, omega=omega, pml=Pml(cells_x=0, cells_z=n_pml),
                       source=PlaneWave(angle_rad=0.0, eps_incidence=eps_s, side="below"))
    t0 = time.perf_counter()
    fd = solve(prob, eps_x, eps_z)
    t_fdfd = time.perf_counter() - t0

    # --- FDTD (Meep): same spacing, same physical region, PML outside
    polys = (
        FdtdPolygon(np.array([[-2 * period, -5 * UM], [3 * period, -5 * UM],
                              [3 * period, 0.0], [-2 * period, 0.0]]), eps_s),
        FdtdPolygon(np.array([[tooth[0], 0.0], [tooth[1], 0.0], [tooth[1], height],
                              [tooth[0], height]]), eps_s),
    )
    x_gap = 0.5 * dx  # a gap between teeth (pixel centre)
    tp = FdtdProblem(size_z_m=n_phys * dx, z_min_m=z_phys0, wavelength_m=lam, period_x_m=period,
                     pml_m=n_pml * dx, eps_incidence=eps_s, polygons=polys,
                     cells_per_um=UM / dx, lines=(("x", z_e), ("z", x_gap)))
    t0 = time.perf_counter()
    td = run_fdtd(tp)
    t_fdtd = time.perf_counter() - t0

    path, vert = td.lines
    ex_fd = fd.sample_ex(path.x, path.z)
    hy_fd = fd.sample_hy(vert.x, vert.z)
    q = omega / v
    x_first = float(path.x[0])
    i_fd = complex(periodic_cell_integral(ex_fd, x_first, td.grid_step_m, fd.bloch_kx, q))
    i_td = complex(periodic_cell_integral(path.ex, x_first, td.grid_step_m, fd.bloch_kx, q))
    out = {
        "period_nm": period * 1e9,
        "eps_silica": eps_s,
        "cells_per_period": nx,
        "path_height_nm": float(path.z[0]) * 1e9,
        "ex_path_rel_diff": float(np.max(np.abs(path.ex - ex_fd)) / np.max(np.abs(ex_fd))),
        "hy_gap_rel_diff": float(np.max(np.abs(vert.hy - hy_fd)) / np.max(np.abs(hy_fd))),
        "I1_fdfd_V": abs(i_fd),
        "I1_fdtd_V": abs(i_td),
        "I1_rel_diff": abs(i_td - i_fd) / abs(i_fd),
        "kappa_fdfd": abs(i_fd) / period,
        "fdfd_s": t_fdfd,
        "fdtd_s": t_fdtd,
        "fdtd_converged": td.converged,
    }
    for k, val in out.items():
        print(f"{k:>20s}: {val:.4g}" if isinstance(val, float) else f"{k:>20s}: {val}")
    if args.plot:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        fig, ax = plt.subplots(figsize=(6, 3.2))
        ax.plot(path.x / UM, np.abs(ex_fd), label="FDFD")
        ax.plot(path.x / UM, np.abs(path.ex), "--", label="FDTD (Meep)")
        ax.set_xlabel("x (um)")
        ax.set_ylabel("|Ex| (V/m per V/m incident)")
        above = (float(path.z[0]) - height) * 1e9
        ax.set_title(f"{above:.0f} nm above a silica grating, period {period * 1e9:.1f} nm")
        ax.legend()
        fig.tight_layout()
        fig.savefig(args.plot, dpi=120)
    return out


if __name__ == "__main__":
    main()
