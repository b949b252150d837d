"""numba: couplings of the Gaussian proposals of two chains (private).

Both chains propose from Gaussians with the same covariance h M^{-1} = h L L^T and their own
means mu_x, mu_y (the current point for a random walk, the Langevin drift's end for MALA). The
reflection-maximal coupling (Jacob, O'Leary & Atchade, JRSS-B 2020, section 4.1; reflection
coupling, Bou-Rabee, Eberle & Zimmer, Ann. Appl. Probab. 2020) works in the whitened
coordinates of the mass matrix, where both proposals are unit normals:

    z = L^{-1} (mu_x - mu_y) / sqrt(h),   xi ~ N(0, I),   x' = mu_x + sqrt(h) L xi
    with probability min(1, phi(xi + z) / phi(xi)):   y' = x'            (the proposals meet)
    otherwise:   y' = mu_y + sqrt(h) L (xi - 2 (e . xi) e),   e = z / |z|

Each marginal is exactly N(mu, h M^{-1}); the proposals are equal with the largest
probability any coupling allows, and otherwise the second is the mirror image of the first
across the hyperplane between the means. When mu_x = mu_y bitwise, z = 0, the ratio is 1 and
the proposals are equal: met chains propose the same point.
"""

import math

from ..models._kernels import jit


@jit
def whitened_difference(mass, h, mu_x, mu_y, z):
    """z = L^{-1} (mu_x - mu_y) / sqrt(h) by forward substitution (L lower triangular,
    L L^T = M^{-1}); returns |z|^2."""
    chol = mass.mass_inv_chol
    d = z.shape[0]
    scale = 1.0 / math.sqrt(h)
    norm2 = 0.0
    for a in range(d):
        s = (mu_x[a] - mu_y[a]) * scale
        for b in range(a):
            s -= chol[a, b] * z[b]
        z[a] = s / chol[a, a]
        norm2 += z[a] * z[a]
    return norm2


@jit
def _scaled_point(mass, h, mu, xi, out):
    """out = mu + sqrt(h) L xi (L lower triangular)."""
    chol = mass.mass_inv_chol
    sqrt_h = math.sqrt(h)
    for a in range(out.shape[0]):
        s = 0.0
        for b in range(a + 1):
            s += chol[a, b] * xi[b]
        out[a] = mu[a] + sqrt_h * s


@jit
def independent_proposal(mass, h, mu, rng, xi, out):
    """One chain's proposal out = mu + sqrt(h) L xi, xi ~ N(0, I) drawn into ``xi``."""
    for a in range(xi.shape[0]):
        xi[a] = rng.standard_normal()
    _scaled_point(mass, h, mu, xi, out)


@jit
def reflection_maximal(mass, h, mu_x, mu_y, rng, xi, z, prop_x, prop_y):
    """Draw (prop_x, prop_y) from the reflection-maximal coupling of N(mu_x, h M^{-1}) and
    N(mu_y, h M^{-1}); ``xi`` and ``z`` (n_coef,) are scratch. Returns whether the proposals
    are equal (then prop_y is a bitwise copy of prop_x)."""
    d = xi.shape[0]
    for a in range(d):
        xi[a] = rng.standard_normal()
    log_u = math.log(rng.random())
    norm2 = whitened_difference(mass, h, mu_x, mu_y, z)
    _scaled_point(mass, h, mu_x, xi, prop_x)
    dot = 0.0
    for a in range(d):
        dot += xi[a] * z[a]
    # log phi(xi + z) - log phi(xi) = -(xi . z) - |z|^2 / 2
    if log_u <= -dot - 0.5 * norm2:
        for a in range(d):
            prop_y[a] = prop_x[a]
        return True
    # reflect xi across the hyperplane orthogonal to e = z / |z|: xi - 2 (e . xi) e
    c = 2.0 * dot / norm2
    for a in range(d):
        xi[a] -= c * z[a]
    _scaled_point(mass, h, mu_y, xi, prop_y)
    return False
