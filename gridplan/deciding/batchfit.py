"""Bounded weighted least squares for many small curve fits at once.

Every learning-curve fit of a grid (each setting, each held-out check, each
bootstrap resample) is a problem with a handful of points and three or four
parameters. Solving them one scipy call at a time costs far more in Python
overhead than in arithmetic, so here they are stacked: problem k has sizes
x[k], errors y[k] and weights w[k] (weight 0 marks a missing point), and one
Levenberg-Marquardt iteration updates all of them with batched linear algebra
(damping on the Jacobi-scaled normal equations, Nocedal & Wright, Numerical
Optimization, 2nd ed., section 10.3), the damping following each step's
gain ratio, actual over predicted decrease (Nielsen's rule). Bounds are kept
by projection: a parameter at a bound whose gradient points outward is held
fixed for that step, the others take the damped Gauss-Newton step, clipped
to the box.
"""

from __future__ import annotations

import numpy as np

#: Iterations at most; a problem stops earlier when its cost stops falling.
MAX_ITERATIONS = 200
#: Relative decrease of the cost below which a problem counts as converged.
RELATIVE_TOLERANCE = 1e-10
#: Damping at the start (then set by each step's gain ratio, see fit_batch).
START_DAMPING = 1e-3
#: Damping beyond which no step can lower the cost any more.
MAX_DAMPING = 1e12
#: Large stand-in for an infinite upper bound when clipping starting points.
FINITE_CAP = 1e12


def parameters_view(theta: np.ndarray) -> np.ndarray:
    """(K, p) parameters as (p, K, 1), so a family's t[i] broadcasts against x of shape (K, n)."""
    return theta.T[:, :, None]


def cost_of(evaluate, x, y, w, theta) -> np.ndarray:
    """Half the weighted sum of squared residuals per problem (inf where not finite)."""
    with np.errstate(all="ignore"):
        r = (evaluate(x, parameters_view(theta)) - y) * w
        cost = 0.5 * np.sum(np.where(w > 0, r, 0.0) ** 2, axis=1)
    return np.where(np.isfinite(cost), cost, np.inf)


def fit_batch(evaluate, jacobian, x: np.ndarray, y: np.ndarray, w: np.ndarray,
              start: np.ndarray, lower: np.ndarray, upper: np.ndarray,
              max_iterations: int = MAX_ITERATIONS) -> tuple[np.ndarray, np.ndarray]:
    """Minimise 0.5 * sum((f(x, theta) - y)^2 * w^2) for each row, within [lower, upper].

    x, y, w are (K, n); start and lower are (K, p) (lower may be (p,)); upper
    is (p,) or (K, p). Returns the parameters (K, p) and the cost (K,).
    """
    x, y, w = (np.asarray(a, dtype=float) for a in (x, y, w))
    y = np.where(w > 0, y, 0.0)
    k_count, p = start.shape
    lower = np.broadcast_to(np.asarray(lower, dtype=float), (k_count, p))
    upper = np.broadcast_to(np.asarray(upper, dtype=float), (k_count, p))
    theta = np.clip(np.nan_to_num(np.asarray(start, dtype=float), nan=1.0, posinf=FINITE_CAP),
                    lower, np.minimum(upper, FINITE_CAP))
    cost = cost_of(evaluate, x, y, w, theta)
    damping = np.full(k_count, START_DAMPING)
    growth = np.full(k_count, 2.0)
    active = np.isfinite(cost)
    eye = np.eye(p)
    for _ in range(max_iterations):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        th, xs, ys, ws = theta[idx], x[idx], y[idx], w[idx]
        lo, hi = lower[idx], upper[idx]
        with np.errstate(all="ignore"):
            t = parameters_view(th)
            r = (evaluate(xs, t) - ys) * ws
            jac = jacobian(xs, t) * ws[..., None]
        r = np.where(np.isfinite(r), r, 0.0)
        jac = np.where(np.isfinite(jac), jac, 0.0)
        gradient = np.einsum("knp,kn->kp", jac, r)
        hessian = np.einsum("knp,knq->kpq", jac, jac)
        pinned = ((th <= lo) & (gradient > 0)) | ((th >= hi) & (gradient < 0))
        free = ~pinned
        # Jacobi scaling (each parameter by the norm of its Jacobian column), so
        # that parameters of very different sensitivity stay well conditioned.
        diag = np.diagonal(hessian, axis1=1, axis2=2)
        norm = np.where(diag > 1e-300, np.sqrt(np.maximum(diag, 1e-300)), 1.0)
        scaled = hessian / (norm[:, :, None] * norm[:, None, :])
        both_free = free[:, :, None] & free[:, None, :]
        system = np.where(both_free, scaled, 0.0) + (damping[idx, None, None] + pinned[:, :, None]) * eye
        rhs = np.where(free, -gradient / norm, 0.0)
        scaled_step = _solve(system, rhs)
        step = scaled_step / norm
        predicted = 0.5 * np.sum(scaled_step * (damping[idx, None] * scaled_step + rhs), axis=1)
        candidate = np.clip(th + step, lo, hi)
        new_cost = cost_of(evaluate, xs, ys, ws, candidate)
        old_cost = cost[idx]
        better = new_cost < old_cost
        theta[idx[better]] = candidate[better]
        cost[idx[better]] = new_cost[better]
        # Damping by the gain ratio (Nielsen's rule: Madsen, Nielsen & Tingleff 2004, eq. 3.14)
        with np.errstate(all="ignore"):
            gain = np.where(predicted > 0, (old_cost - new_cost) / predicted, 1.0)
        shrink = np.maximum(1.0 / 3.0, 1.0 - (2.0 * np.clip(gain, 0.0, 1.0) - 1.0) ** 3)
        damping[idx] = np.where(better, damping[idx] * shrink, damping[idx] * growth[idx])
        growth[idx] = np.where(better, 2.0, growth[idx] * 2.0)
        settled = better & (old_cost - new_cost <= RELATIVE_TOLERANCE * old_cost + 1e-300)
        stuck = ~better & (damping[idx] > MAX_DAMPING)
        active[idx[settled | stuck]] = False
    return theta, cost


def _solve(system: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Batched solve; a singular or non-finite system gives a zero step for that problem."""
    finite = np.all(np.isfinite(system), axis=(1, 2)) & np.all(np.isfinite(rhs), axis=1)
    step = np.zeros_like(rhs)
    if finite.any():
        try:
            step[finite] = np.linalg.solve(system[finite], rhs[finite][..., None])[..., 0]
        except np.linalg.LinAlgError:
            for i in np.flatnonzero(finite):
                try:
                    step[i] = np.linalg.solve(system[i], rhs[i])
                except np.linalg.LinAlgError:
                    pass
    return np.where(np.isfinite(step), step, 0.0)


def nonnegative_line(basis: np.ndarray, y: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, ...]:
    """Weighted least squares y ~ a + b * basis with a, b >= 0, for every row at once.

    basis, y, w have the same shape (..., n). Returns (a, b, residual sum of
    squares), each of shape (...). The optimum lies at the unconstrained
    solution or on an edge of the quadrant; all four candidates are scored.
    """
    w2 = np.where(w > 0, w * w, 0.0)
    y = np.where(w > 0, y, 0.0)
    s0, s1, s2 = w2.sum(-1), (w2 * basis).sum(-1), (w2 * basis * basis).sum(-1)
    t0, t1 = (w2 * y).sum(-1), (w2 * basis * y).sum(-1)
    with np.errstate(all="ignore"):
        det = s0 * s2 - s1 * s1
        a_free = (s2 * t0 - s1 * t1) / det
        b_free = (s0 * t1 - s1 * t0) / det
        b_only = np.maximum(t1 / s2, 0.0)
        a_only = np.maximum(t0 / s0, 0.0)
    candidates = [(a_free, b_free), (np.zeros_like(b_only), b_only),
                  (a_only, np.zeros_like(a_only))]
    best_a, best_b = np.zeros_like(s0), np.zeros_like(s0)
    best = np.full_like(s0, np.inf)
    for a, b in candidates:
        with np.errstate(all="ignore"):
            rss = (w2 * (a[..., None] + b[..., None] * basis - y) ** 2).sum(-1)
        ok = (a >= 0) & (b >= 0) & np.isfinite(rss) & (rss < best)
        best_a, best_b, best = np.where(ok, a, best_a), np.where(ok, b, best_b), np.where(ok, rss, best)
    return best_a, best_b, best
