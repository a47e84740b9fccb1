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
of this linear map.  ``jnp.linalg.eig`` runs on CPU only, like the rest of this solver.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp

BROADENING = 1e-10


@jax.custom_jvp
def eig(a):
    """Eigenvalues ``lam`` (n,) and right eigenvectors ``W`` (n, n, columns) of ``a``."""
    lam, w = jnp.linalg.eig(a)
    return lam, w


@eig.defjvp
def _eig_jvp(primals, tangents):
    (a,), (da,) = primals, tangents
    lam, w = eig(a)
    da = jnp.asarray(da, dtype=lam.dtype)
    c = jnp.linalg.solve(w, da @ w)
    diff = lam[None, :] - lam[:, None]
    delta = BROADENING * jnp.maximum(1.0, jnp.max(jnp.abs(lam)))
    f = jnp.conj(diff) / (jnp.abs(diff) ** 2 + delta**2)
    f = f * (1.0 - jnp.eye(lam.shape[0]))
    return (lam, w), (jnp.diagonal(c), w @ (f * c))
