"""Batched expectation–maximisation for one- and two-component Gaussian fits, all accounts at once.

Samples are (A, N) with NaN marking "no value"; every account gets its own fit in one set of
array operations (no Python loop over accounts).
"""

from __future__ import annotations

import numpy as np

LOG_2PI = np.log(2 * np.pi)


def _logaddexp_pair(a, b):
    """log(exp(a) + exp(b)) elementwise; faster than a general logsumexp for two terms."""
    high = np.maximum(a, b)
    return high + np.log1p(np.exp(-np.abs(a - b)))


def _masked(x):
    valid = np.isfinite(x)
    return np.where(valid, x, 0.0), valid, valid.sum(axis=1)


def fit_normal(x, var_floor: float = 1e-4):
    """Per-account mean, variance (maximum likelihood, floored) and log-likelihood; x (A, N)."""
    values, valid, n = _masked(np.asarray(x, float))
    n_safe = np.maximum(n, 1)
    mean = values.sum(axis=1) / n_safe
    var = np.where(valid, (values - mean[:, None]) ** 2, 0.0).sum(axis=1) / n_safe
    var = np.maximum(var, var_floor)
    loglik = np.where(valid, -0.5 * (LOG_2PI + np.log(var)[:, None] + (values - mean[:, None]) ** 2 / var[:, None]), 0.0).sum(axis=1)
    return mean, var, loglik


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
    with np.errstate(all="ignore"):
        q = np.nanpercentile(np.where(valid, x, np.nan), [25, 75], axis=1).T if x.shape[1] else np.zeros((x.shape[0], 2))
    q = np.nan_to_num(q)
    means = q.copy()
    mean_all = values.sum(axis=1) / n_safe
    pooled = np.where(valid, (values - mean_all[:, None]) ** 2, 0.0).sum(axis=1) / n_safe
    variances = np.repeat(np.maximum(pooled, var_floor)[:, None], 2, axis=1)
    weights = np.full((x.shape[0], 2), 0.5)
    # Each account stops at its own convergence: a converged account's rows leave the arrays,
    # so the result does not depend on which accounts share the batch and later iterations
    # cost only what is still moving.
    iterations = np.zeros(x.shape[0], dtype=np.int64)
    active = np.arange(x.shape[0])
    previous = np.full(x.shape[0], -np.inf)
    for iteration in range(1, max_iter + 1):
        if active.size == 0:
            break
        v, ok, w, m, var = values[active], valid[active], weights[active], means[active], variances[active]
        # E-step: log responsibilities (a, N, 2) for the a accounts still active.
        log_dens = -0.5 * (LOG_2PI + np.log(var)[:, None, :] + (v[:, :, None] - m[:, None, :]) ** 2 / var[:, None, :])
        log_joint = log_dens + np.log(w)[:, None, :]
        log_norm = _logaddexp_pair(log_joint[:, :, 0], log_joint[:, :, 1])
        loglik = np.where(ok, log_norm, 0.0).sum(axis=1)
        resp = np.exp(log_joint - log_norm[:, :, None]) * ok[:, :, None]
        # M-step.
        nk = resp.sum(axis=1) + 1e-12
        w = np.clip(nk / n_safe[active, None], min_weight, 1 - min_weight)
        weights[active] = w / w.sum(axis=1, keepdims=True)
        m = (resp * v[:, :, None]).sum(axis=1) / nk
        means[active] = m
        variances[active] = np.maximum((resp * (v[:, :, None] - m[:, None, :]) ** 2).sum(axis=1) / nk, var_floor)
        iterations[active] = iteration
        converged = np.abs(loglik - previous[active]) <= tol * np.maximum(1.0, np.abs(loglik))
        previous[active] = loglik
        active = active[~converged]
    iteration = int(iterations.max()) if iterations.size else 0
    # Final log-likelihood at the returned parameters.
    log_dens = -0.5 * (LOG_2PI + np.log(variances)[:, None, :]
                       + (values[:, :, None] - means[:, None, :]) ** 2 / variances[:, None, :])
    log_joint = log_dens + np.log(weights)[:, None, :]
    loglik = np.where(valid, _logaddexp_pair(log_joint[:, :, 0], log_joint[:, :, 1]), 0.0).sum(axis=1)
    order = np.argsort(means, axis=1)
    take = lambda a: np.take_along_axis(a, order, axis=1)  # noqa: E731 - sort components by mean
    return take(weights), take(means), take(variances), loglik, iteration


def bic(loglik, n_parameters: int, n_effective):
    """Schwarz (1978): −2 log L + p ln n."""
    return -2.0 * np.asarray(loglik) + n_parameters * np.log(np.maximum(n_effective, 1.0))
