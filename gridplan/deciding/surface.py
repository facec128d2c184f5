"""A joint surface of error over capacity and training size."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from gridplan.common.errors import GridplanError

# --- joint surface over capacity and data ------------------------------------------

@dataclass(frozen=True)
class JointSurface:
    """Error as a function of capacity N and training size D: E + A / N^alpha + B / D^beta.

    The form of Hoffmann et al. (2022); useful where a single setting has
    too few sizes for its own curve but neighbouring capacities share data.
    """

    E: float
    A: float
    alpha: float
    B: float
    beta: float

    @property
    def params(self) -> dict[str, float]:
        return {"E": self.E, "A": self.A, "alpha": self.alpha, "B": self.B, "beta": self.beta}

    def predict(self, capacity, size) -> np.ndarray:
        """Predicted error at capacity value(s) N and training size(s) D."""
        n = np.asarray(capacity, dtype=float)
        d = np.asarray(size, dtype=float)
        return self.E + self.A * np.power(n, -self.alpha) + self.B * np.power(d, -self.beta)


def fit_joint_surface(capacity, size, error, *, huber_delta: float = 1e-3) -> JointSurface:
    """Fit E + A/N^alpha + B/D^beta to (capacity, size, error) points.

    Like Hoffmann et al. (2022): residuals are differences of log errors, the
    loss is Huber with threshold `huber_delta`, log A, log B, log E are free
    and alpha, beta >= 0; several starts, the lowest loss wins.  N and D are
    scaled by their largest values while fitting.
    """
    from scipy.optimize import least_squares
    from scipy.special import logsumexp, softmax

    n = np.asarray(capacity, dtype=float).ravel()
    d = np.asarray(size, dtype=float).ravel()
    e = np.asarray(error, dtype=float).ravel()
    if not (n.size == d.size == e.size):
        raise GridplanError("Capacity, size and error must have one value per point.")
    keep = np.isfinite(n) & np.isfinite(d) & np.isfinite(e) & (n > 0) & (d > 0) & (e > 0)
    if keep.sum() < 6 or len(np.unique(n[keep])) < 2 or len(np.unique(d[keep])) < 2:
        raise GridplanError("A joint surface needs at least 6 positive errors spread over "
                            "two or more capacities and sizes.")
    n, d, e = n[keep], d[keep], e[keep]
    n_top, d_top = n.max(), d.max()
    log_n, log_d, log_e = np.log(n / n_top), np.log(d / d_top), np.log(e)

    def terms(t):
        return np.stack([t[0] - t[1] * log_n, t[2] - t[3] * log_d, np.full_like(log_n, t[4])])

    def residuals(t):
        return logsumexp(terms(t), axis=0) - log_e

    def jacobian(t):
        shares = softmax(terms(t), axis=0)
        return np.column_stack([shares[0], -shares[0] * log_n, shares[1], -shares[1] * log_d,
                                shares[2]])

    lower = [-np.inf, 0.0, -np.inf, 0.0, -np.inf]
    upper = [np.inf, 5.0, np.inf, 5.0, np.inf]
    floor_guess = np.log(0.5 * e.min())
    best = None
    for exponent in (0.3, 1.0):
        for log_a in (np.log(0.1 * e.min()), np.log(e.mean())):
            start = [log_a, exponent, log_a, exponent, floor_guess]
            result = least_squares(residuals, start, jac=jacobian, bounds=(lower, upper),
                                   loss="huber", f_scale=huber_delta, max_nfev=300)
            if best is None or result.cost < best.cost:
                best = result
    la, alpha, lb, beta, le = best.x
    return JointSurface(E=float(np.exp(le)), A=float(np.exp(la) * n_top ** alpha),
                        alpha=float(alpha), B=float(np.exp(lb) * d_top ** beta), beta=float(beta))
