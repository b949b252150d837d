"""numba: the Langevin proposal and its density with a factored mass matrix (private).

M^{-1} = S C_k S, C_k^p = I + Q_k diag(lambda_k^p - 1) Q_k^T (posterior/_mass.py): every
product below costs O(d k), never O(d^2). `_transition._propose` and
`_transition._langevin_log_density` call these when the `MassMatrix` has a ``scale``.
"""

import math

from ..models._kernels import jit


@jit
def add_mass_inv_times(mass, g, factor, out):
    """out += factor M^{-1} g = factor S (w + Q_k ((lambda_k - 1) * (Q_k^T w))), w = S g."""
    s, q, pw = mass.scale, mass.basis, mass.powers
    d = s.shape[0]
    for a in range(d):
        out[a] += factor * (s[a] * (s[a] * g[a]))
    for j in range(q.shape[1]):
        t = 0.0
        for a in range(d):
            t += q[a, j] * (s[a] * g[a])
        t *= factor * pw[0, j]
        for a in range(d):
            out[a] += s[a] * (q[a, j] * t)


@jit
def propose_factored(mass, langevin, beta, grad, h, rng, xi, prop):
    """prop = beta + sqrt(h) S C_k^{1/2} xi (+ (h/2) M^{-1} grad), xi ~ N(0, I) drawn into
    ``xi``: the noise has covariance h S C_k S = h M^{-1}."""
    s, q, pw = mass.scale, mass.basis, mass.powers
    d = beta.shape[0]
    for a in range(d):
        xi[a] = rng.standard_normal()
        prop[a] = xi[a]
    for j in range(q.shape[1]):
        t = 0.0
        for a in range(d):
            t += q[a, j] * xi[a]
        t *= pw[1, j]
        for a in range(d):
            prop[a] += q[a, j] * t
    sqrt_h = math.sqrt(h)
    for a in range(d):
        prop[a] = beta[a] + sqrt_h * (s[a] * prop[a])
    if langevin:
        add_mass_inv_times(mass, grad, 0.5 * h, prop)


@jit
def langevin_log_density_factored(beta_to, beta_from, grad_from, h, mass, z):
    """log q(beta_to | beta_from) with the factored mass, up to a constant: z'Mz = u'u + sum_j (1/lambda_j - 1)
    (q_j'u)^2, u = S^{-1} z."""
    s, q, pw = mass.scale, mass.basis, mass.powers
    d = beta_to.shape[0]
    for a in range(d):
        z[a] = beta_to[a] - beta_from[a]
    add_mass_inv_times(mass, grad_from, -0.5 * h, z)
    quad = 0.0
    for a in range(d):
        quad += (z[a] / s[a]) ** 2
    for j in range(q.shape[1]):
        t = 0.0
        for a in range(d):
            t += q[a, j] * (z[a] / s[a])
        quad += pw[2, j] * t * t
    return -0.5 * quad / h
