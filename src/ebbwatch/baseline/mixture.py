"""Batched expectation–maximisation for one- and two-component Gaussian fits, all accounts at once.

Samples are (A, N) with NaN marking "no value"; every account gets its own fit in one set of
array operations (no Python loop over accounts).
"""

from __future__ import annotations

import numpy as np

LOG_2PI = np.log(2 * np.pi)


def _masked(x):
    valid = np.isfinite(x)
    return np.where(valid, x, 0.0), valid, valid.sum(axis=1)


def fit_normal(x, var_floor: float = 1e-4):
    """Per-account mean, variance (maximum likelihood, floored) and log-likelihood; x (A, N)."""
    values, valid, n = _masked(np.asarray(x, float))
    n_safe = np.maximum(n, 1)
    mean = values.sum(axis=1) / n_safe
    # Squared deviations in the scratch copy itself (the same numbers as
    # ``np.where(valid, (values - mean) ** 2, 0)``, without two more (A, N) temporaries).
    deviations = np.subtract(values, mean[:, None], out=values)
    np.square(deviations, out=deviations)
    deviations[~valid] = 0.0
    squares = deviations.sum(axis=1)
    var = np.maximum(squares / n_safe, var_floor)
    # Σ log N(x; mean, var) over the valid values, in closed form from the sum of squares.
    loglik = -0.5 * (n * (LOG_2PI + np.log(var)) + squares / var)
    return mean, var, loglik


def row_quantiles(x, quantiles) -> np.ndarray:
    """Quantiles (numpy's default linear interpolation) of each row's finite values, (A, Q);
    0 for a row without any.  One sort of the whole array instead of ``np.nanpercentile``'s
    loop over rows."""
    x = np.asarray(x, float)
    valid = np.isfinite(x)
    n = valid.sum(axis=1)
    ordered = np.sort(np.where(valid, x, np.inf), axis=1)
    last = np.maximum(n - 1, 0)
    rows = np.arange(x.shape[0])
    out = np.zeros((x.shape[0], len(quantiles)))
    if not x.shape[1]:
        return out
    for j, q in enumerate(quantiles):
        position = q * last
        below = np.floor(position).astype(np.int64)
        a, b = ordered[rows, below], ordered[rows, np.minimum(below + 1, last)]
        with np.errstate(invalid="ignore"):
            out[:, j] = np.where(n > 0, a + (b - a) * (position - below), 0.0)
    return out


def _e_step(v, weights, means, variances):
    """For values ``v`` (a, N) under each row's two components: the log mixture density and the
    second component's responsibility, both (a, N).  One exp per value: the responsibility is
    the logistic of the two log joints' difference."""
    const = np.log(weights) - 0.5 * (LOG_2PI + np.log(variances))  # (a, 2)
    joint0 = const[:, :1] - 0.5 * (v - means[:, :1]) ** 2 / variances[:, :1]
    joint1 = const[:, 1:] - 0.5 * (v - means[:, 1:]) ** 2 / variances[:, 1:]
    diff = joint1 - joint0
    small = np.exp(-np.abs(diff))
    log_density = np.maximum(joint0, joint1) + np.log1p(small)
    responsibility = np.where(diff >= 0, 1.0, small) / (1.0 + small)
    return log_density, responsibility


def fit_two_gaussians(x, *, max_iter: int = 100, tol: float = 1e-6, var_floor: float = 1e-4,
                      min_weight: float = 0.1):
    """Two-component Gaussian mixtures by batched EM.

    Starts each account at its 25th and 75th percentiles with the pooled variance, as a
    k-means-like start does.  ``var_floor`` keeps a component from collapsing onto a run of equal
    values, and weights are kept at or above ``min_weight`` (``../shared/METHODS.md``: a block of
    zeros otherwise wins BIC by a mile).

    Returns ``weights (A, 2), means (A, 2), variances (A, 2), loglik (A,), iterations``.
    """
    x = np.asarray(x, float)
    values, valid, n = _masked(x)
    n_safe = np.maximum(n, 1)
    n_accounts = x.shape[0]
    means = row_quantiles(x, (0.25, 0.75))
    mean_all = values.sum(axis=1) / n_safe
    pooled = np.where(valid, (values - mean_all[:, None]) ** 2, 0.0).sum(axis=1) / n_safe
    variances = np.repeat(np.maximum(pooled, var_floor)[:, None], 2, axis=1)
    weights = np.full((n_accounts, 2), 0.5)
    in_sample = valid.astype(float)
    # Each account stops at its own convergence: a converged account's rows leave the arrays,
    # so the result does not depend on which accounts share the batch and later iterations
    # cost only what is still moving.
    iterations = np.zeros(n_accounts, dtype=np.int64)
    active = np.arange(n_accounts)
    previous = np.full(n_accounts, -np.inf)
    for iteration in range(1, max_iter + 1):
        if active.size == 0:
            break
        v, ok = values[active], in_sample[active]
        log_density, responsibility = _e_step(v, weights[active], means[active], variances[active])
        loglik = (log_density * ok).sum(axis=1)
        # M-step, component by component on (a, N) arrays.
        resp = (ok - responsibility * ok, responsibility * ok)
        nk = np.column_stack([r.sum(axis=1) for r in resp]) + 1e-12
        w = np.clip(nk / n_safe[active, None], min_weight, 1 - min_weight)
        weights[active] = w / w.sum(axis=1, keepdims=True)
        m = np.column_stack([(r * v).sum(axis=1) for r in resp]) / nk
        means[active] = m
        spread = np.column_stack([(r * (v - m[:, k:k + 1]) ** 2).sum(axis=1) for k, r in enumerate(resp)])
        variances[active] = np.maximum(spread / nk, var_floor)
        iterations[active] = iteration
        converged = np.abs(loglik - previous[active]) <= tol * np.maximum(1.0, np.abs(loglik))
        previous[active] = loglik
        active = active[~converged]
    iteration = int(iterations.max()) if iterations.size else 0
    # Final log-likelihood at the returned parameters.
    log_density, _ = _e_step(values, weights, means, variances)
    loglik = np.where(valid, log_density, 0.0).sum(axis=1)
    order = np.argsort(means, axis=1)
    take = lambda a: np.take_along_axis(a, order, axis=1)  # noqa: E731 - sort components by mean
    return take(weights), take(means), take(variances), loglik, iteration


def bic(loglik, n_parameters: int, n_effective):
    """Schwarz (1978): −2 log L + p ln n."""
    return -2.0 * np.asarray(loglik) + n_parameters * np.log(np.maximum(n_effective, 1.0))
