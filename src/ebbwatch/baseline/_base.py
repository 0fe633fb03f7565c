"""The contract every baseline and detector follows (scikit-learn's habits).

Settings are stored unchanged in ``__init__`` and checked in ``fit``; ``fit`` returns ``self``;
learned arrays end in ``_`` and have the accounts on axis 0; randomness only through ``seed``.
"""

from __future__ import annotations

import numpy as np


class Estimator:
    _parameters: tuple[str, ...] = ()

    def get_params(self) -> dict:
        return {name: getattr(self, name) for name in self._parameters}

    def __repr__(self):
        args = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        return f"{type(self).__name__}({args})"

    def _check_fitted(self, attribute: str):
        if not hasattr(self, attribute):
            raise RuntimeError(f"{type(self).__name__} is not fitted yet; call fit first")


def check_matrix(x, name: str = "x", ndim: int = 2) -> np.ndarray:
    """A float64 array of the given dimension (NaN allowed: it means "no value")."""
    array = np.asarray(x, dtype=np.float64)
    if array.ndim != ndim:
        raise ValueError(f"{name} must be a {ndim}-d array (accounts first), got shape {array.shape}")
    if np.isinf(array).any():
        raise ValueError(f"{name} contains infinite values; use NaN for missing days")
    return array
