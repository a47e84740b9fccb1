"""General complex eigendecomposition with a derivative rule that tolerates degeneracy.

``A = W diag(lam) W^{-1}``.  First-order perturbation theory (e.g. R. B. Nelson, AIAA J.
14, 1201 (1976); M. B. Giles, "An extended collection of matrix derivative results for
forward and reverse mode algorithmic differentiation", Oxford NA report 08/01, 2008):
with ``C = W^{-1} dA W``,

    d lam_i = C_ii,     dW = W (F o C),     F_ij = 1 / (lam_j - lam_i)  (i != j),  F_ii = 0.

``F_ii = 0`` fixes the gauge (each eigenvector changes only along the others); every
quantity we build from the modes (S-matrices, fields) is invariant under rescaling the
eigenvectors, so the gauge does not matter.  Degenerate or nearly degenerate pairs make
``1/(lam_j - lam_i)`` blow up although a gauge-invariant result has a finite derivative
(the degenerate subspace rotates freely).  We use the Lorentzian-broadened

    F_ij = conj(lam_j - lam_i) / (|lam_j - lam_i|^2 + delta^2),
    delta = BROADENING * max(1, max |lam|),

which equals ``1/(lam_j - lam_i)`` to relative ``(delta/|lam_j - lam_i|)^2`` for
separated pairs and goes smoothly to zero for exactly degenerate ones (the degenerate
pair's mixing is then dropped: exact when the objective is invariant within the
subspace, which holds for symmetric structures whose degeneracy is set by symmetry).

The rule is written as a ``jax.custom_jvp``; reverse mode follows by JAX's transposition
of this linear map, and the decomposition of the forward pass is the only one computed
(the tangent map needs ``W``, ``lam`` and one LU of ``W``).

The decomposition itself runs in numpy's LAPACK (``geev``) through ``jax.pure_callback``:
on CPU it is several times faster than ``jnp.linalg.eig`` for our matrices
(``studies/benchmarks/fmm.py``).  A matrix whose imaginary part is at rounding level
(``|Im a| <= REAL_TOLERANCE max|a|``: lossless layers with centrosymmetric, centred
shapes, any in-plane wavevector) goes to the real ``dgeev``, about six times cheaper
than the complex one; its eigenvalues come in conjugate pairs and are returned complex,
like the others.  Dropping an imaginary part of relative size <= 1e-14 changes the
eigenpairs by that much times their condition numbers, far below what the modal
truncation leaves.  Batched calls (``jax.vmap``) reach numpy as one stack.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

BROADENING = 1e-10
REAL_TOLERANCE = 1e-14


def _eig_host(a):
    a = np.asarray(a)
    lead = a.shape[:-2]
    n = a.shape[-1]
    flat = a.reshape((-1, n, n))
    lam = np.empty(flat.shape[:2], dtype=np.complex128)
    w = np.empty(flat.shape, dtype=np.complex128)
    for k, mat in enumerate(flat):
        scale = np.max(np.abs(mat)) if mat.size else 0.0
        if np.max(np.abs(mat.imag), initial=0.0) <= REAL_TOLERANCE * scale:
            mat = mat.real
        lam[k], w[k] = np.linalg.eig(mat)
    return lam.reshape(lead + (n,)), w.reshape(lead + (n, n))


@jax.custom_jvp
def eig(a):
    """Eigenvalues ``lam`` (n,) and right eigenvectors ``W`` (n, n, columns) of ``a``."""
    a = jnp.asarray(a, dtype=complex)
    n = a.shape[-1]
    shapes = (jax.ShapeDtypeStruct(a.shape[:-1], jnp.complex128),
              jax.ShapeDtypeStruct(a.shape[:-2] + (n, n), jnp.complex128))
    return jax.pure_callback(_eig_host, shapes, a, vmap_method="broadcast_all")


@eig.defjvp
def _eig_jvp(primals, tangents):
    (a,), (da,) = primals, tangents
    lam, w = eig(a)
    da = jnp.asarray(da, dtype=lam.dtype)
    c = jnp.linalg.solve(w, da @ w)
    diff = lam[..., None, :] - lam[..., :, None]
    delta = BROADENING * jnp.maximum(1.0, jnp.max(jnp.abs(lam), axis=-1))[..., None, None]
    f = jnp.conj(diff) / (jnp.abs(diff) ** 2 + delta**2)
    f = f * (1.0 - jnp.eye(lam.shape[-1]))
    return (lam, w), (jnp.diagonal(c, axis1=-2, axis2=-1), w @ (f * c))
