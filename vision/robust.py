"""Small robust fitting tools, vectorised over many problems at once: a soft-L1 Levenberg-Marquardt and
a median over masked rows."""

from __future__ import annotations

import numpy as np

__all__ = ["soft_l1", "robust_lm", "masked_median"]

def soft_l1(r, scale: float):
    """The soft-L1 cost of residual rows (..., N): sum sqrt(1 + (r / scale)^2) - 1."""
    return np.sum(np.sqrt(1.0 + (r / scale) ** 2) - 1.0, axis=-1)


def robust_lm(residual, x0: np.ndarray, scale: float, iterations: int = 4):
    """Minimise sum rho(r_i) (rho soft L1 with ``scale``) for R problems at once, by Levenberg-Marquardt
    on iteratively reweighted least squares. ``residual`` maps parameters (R, m, n) to residuals
    (R, m, N). Each iteration is one call: the residuals at each problem's proposed point and at its
    forward-difference probes; a proposal that does not lower a problem's cost is dropped (the damping
    goes up ten-fold), one that does is kept with its Jacobian (the damping comes down). Each problem
    stops on its own when its accepted step is below 1e-3 (in the parameters' units).
    Returns (x (R, n), residuals (R, N))."""
    x = np.array(x0, float)
    rows, n = x.shape
    eye = np.eye(n)

    def probe(at):
        eps = 1e-6 * np.maximum(1.0, np.abs(at))                              # (R, n)
        rr = residual(np.concatenate([at[:, None], at[:, None] + eye * eps[:, None, :]], axis=1))
        return rr[:, 0], (rr[:, 1:] - rr[:, :1]) / eps[:, :, None]            # (R, N), (R, n, N)

    r, J = probe(x)
    c = soft_l1(r, scale)
    damping = np.full(rows, 1e-3)
    active = np.ones(rows, bool)
    for _ in range(iterations):
        w = 1.0 / np.sqrt(1.0 + (r / scale) ** 2)                              # IRLS weights of soft L1
        A = np.einsum("rin,rjn->rij", J * w[:, None, :], J) + 1e-9 * eye
        g = np.einsum("rin,rn->ri", J, w * r)
        M = A + damping[:, None, None] * (np.diagonal(A, axis1=1, axis2=2)[:, :, None] * eye)
        step = np.linalg.solve(M, g[..., None])[..., 0]
        r_new, J_new = probe(x - step)
        c_new = soft_l1(r_new, scale)
        good = (c_new < c) & active
        x = np.where(good[:, None], x - step, x)
        r = np.where(good[:, None], r_new, r)
        J = np.where(good[:, None, None], J_new, J)
        c = np.where(good, c_new, c)
        damping = np.where(good, np.maximum(damping / 10.0, 1e-7), damping * 10.0)
        active &= ~(good & (np.abs(step).max(axis=1) < 1e-3))
        if not active.any():
            break
    return x, r


def masked_median(values: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """Median of each row of ``values`` (rows, n) over its entries where ``mask`` (bool) is set; NaN for
    a row with none."""
    a = np.sort(np.where(mask, values, np.inf), axis=1)
    count = np.maximum(mask.sum(axis=1), 1)
    at = np.arange(len(a))
    median = 0.5 * (a[at, (count - 1) // 2] + a[at, count // 2])
    return np.where(mask.any(axis=1), median, np.nan)
