"""Changepoints: a vectorised CUSUM screen over all accounts, then PELT's exact search (ruptures)
on the accounts the screen picks."""

from __future__ import annotations

import ctypes

import numpy as np

from ..baseline._base import Estimator, check_matrix
from ..series import fast_nanmedian_rows


def robust_sigma(u) -> np.ndarray:
    """Noise scale per account from the MAD of first differences / √2 (robust to level shifts).

    ``u`` (A, D), NaN ignored.  1.4826 · MAD estimates a normal standard deviation.
    """
    diffs = np.diff(np.asarray(u, float), axis=1)
    centre = fast_nanmedian_rows(diffs)[:, None]
    mad = fast_nanmedian_rows(np.abs(diffs - centre))
    return 1.4826 * np.nan_to_num(mad) / np.sqrt(2.0)


def fill_gaps(u) -> np.ndarray:
    """Replace NaN by the previous valid value in each row (leading NaN by the first valid one;
    an all-NaN row by 0).

    ruptures puts a breakpoint every two samples after a NaN (``../shared/METHODS.md``), so no
    NaN may reach it.  Carrying the last value forward adds no change of its own.
    """
    u = np.asarray(u, float)
    ok = np.isfinite(u)
    n = u.shape[1]
    idx = np.where(ok, np.arange(n)[None, :], -1)
    forward = np.maximum.accumulate(idx, axis=1)
    first_valid = np.where(ok.any(axis=1), ok.argmax(axis=1), 0)
    source = np.where(forward >= 0, forward, first_valid[:, None])
    filled = np.take_along_axis(u, source, axis=1)
    return np.where(np.isfinite(filled), filled, 0.0)


def _breakpoints_from_path(path, n: int) -> list[int]:
    """Walk PELT's back-pointer ``path`` (n + 1 entries) from the end into segment ends."""
    breakpoints, end = [], n
    while end > 0:
        breakpoints.append(end)
        end = int(path[end])
    return breakpoints[::-1]


class _KernelGeneric(ctypes.Structure):
    _fields_ = [("name", ctypes.c_char_p)]


class _KernelLinear(ctypes.Structure):
    _fields_ = [("base", ctypes.POINTER(_KernelGeneric))]


def _ctypes_pelt_l2():
    """ruptures' C function ``ekcpd_pelt_compute`` with the linear kernel, called through
    ctypes, or None where it cannot be had.

    ruptures' ``KernelCPD(kernel="linear")`` reaches the same C code through a Cython wrapper
    that holds the GIL for the whole search: with two chunks scored in threads, one thread's
    searches (about a sixth of a chunk's time) stopped the other at every numpy call.  ctypes
    releases the GIL while the C code runs.  The function's signature is ruptures 1.1's
    (``ekcpd_pelt_computation.h``); other versions use the Cython core.
    """
    from importlib.metadata import PackageNotFoundError, version

    try:
        from ruptures.detection._detection import ekcpd

        if not version("ruptures").startswith("1.1."):
            return None
    except (ImportError, PackageNotFoundError):
        return None
    try:
        compute = ctypes.CDLL(ekcpd.__file__).ekcpd_pelt_compute
    except (OSError, AttributeError):
        return None
    compute.argtypes = [ctypes.c_void_p, ctypes.c_int, ctypes.c_int, ctypes.c_double, ctypes.c_int,
                        ctypes.c_void_p, ctypes.c_void_p]
    compute.restype = None
    base = _KernelGeneric(b"linear")
    kernel = _KernelLinear(ctypes.pointer(base))
    kernel_address = ctypes.addressof(kernel)

    def search_rows(signal, penalties, min_size):
        """Breakpoints of each row of ``signal`` (A, n) float64 C-contiguous."""
        n = signal.shape[1]
        path = np.zeros(n + 1, dtype=np.intc)
        path_address = path.ctypes.data
        row_bytes = signal.strides[0]
        first = signal.ctypes.data
        found = []
        for i, penalty in enumerate(penalties.tolist()):
            compute(first + i * row_bytes, n, 1, penalty, min_size, kernel_address, path_address)
            found.append(_breakpoints_from_path(path, n))
        return found

    search_rows.keep_alive = (base, kernel)  # the C code reads them through raw pointers
    return search_rows


def _pelt_l2_rows():
    """``search_rows(signal (A, n) float64 C-contiguous, penalties (A,), min_size) -> breakpoints``.

    ruptures' ``KernelCPD(kernel="linear").fit(x).predict(pen=...)`` builds a cost object, copies
    and checks the signal, then calls its C core and walks the returned path back into
    breakpoints.  On a few thousand short rows per chunk that wrapper costs about a third of the
    time (0.12 against 0.084 ms a 182-day row) and holds the GIL throughout, so the C function
    is called directly (:func:`_ctypes_pelt_l2`), else through ruptures' Cython core, else the
    public API; tests/test_references.py checks every route against the public API.
    """
    direct = _ctypes_pelt_l2()
    if direct is not None:
        return direct
    try:
        from ruptures.detection._detection.ekcpd import ekcpd_pelt_L2
    except ImportError:  # a ruptures without that module: the public API, same breakpoints
        import ruptures as rpt

        def search(row, penalty, min_size):
            return rpt.KernelCPD(kernel="linear", min_size=min_size, jump=1).fit(row).predict(pen=penalty)
    else:
        def search(row, penalty, min_size):
            return _breakpoints_from_path(ekcpd_pelt_L2(row, penalty, min_size), row.shape[0])

    def search_rows(signal, penalties, min_size):
        return [search(np.ascontiguousarray(row.reshape(-1, 1)), float(penalty), min_size)
                for row, penalty in zip(signal, penalties)]
    return search_rows


_SEARCH_ROWS = None


def pelt_l2_rows(signal, penalties, min_size: int) -> list[list[int]]:
    """PELT with the L2 cost (ruptures' ``KernelCPD(kernel="linear")``, ``jump=1``) on each row
    of ``signal`` (A, n) with its own penalty; ruptures' breakpoint lists (the last is n)."""
    global _SEARCH_ROWS
    signal = np.ascontiguousarray(signal, dtype=np.float64)
    if signal.ndim != 2 or min_size < 1:
        raise ValueError(f"expected an (A, n) signal and min_size >= 1, got shape {signal.shape} and {min_size}")
    if signal.shape[1] < 2 * min_size:  # no room for a change (the C code assumes there is)
        return [[signal.shape[1]] for _ in range(signal.shape[0])]
    if _SEARCH_ROWS is None:
        _SEARCH_ROWS = _pelt_l2_rows()
    return _SEARCH_ROWS(signal, np.asarray(penalties, np.float64), int(min_size))


def cusum_split(u, first: int, last: int, sigma, starts=None):
    """The best single split of each row of ``u`` (A, L) with a split column in [first, last].

    For each split ``k``, the standardised difference of the means after and before,
    ``(mean[k:] − mean[:k]) / (σ · sqrt(1/k + 1/(L − k)))``.  Returns ``(k, statistic)`` with
    the statistic signed (negative for a drop).  ``u`` must have no NaN.  ``starts`` (A,): the
    column each row's data begins at (None: 0); the "before" side counts from there, and a split
    at or before it scores 0.
    """
    u = np.asarray(u, float)
    n = u.shape[1]
    csum = np.cumsum(u, axis=1)
    total = csum[:, -1:]
    ks = np.arange(max(first, 1), min(last, n - 1) + 1)
    starts = np.zeros((u.shape[0], 1), np.int64) if starts is None else np.asarray(starts, np.int64)[:, None]
    ahead = np.where(starts > 0, np.take_along_axis(csum, np.maximum(starts - 1, 0), axis=1), 0.0)
    width = np.maximum(ks[None, :] - starts, 1)
    before = (csum[:, ks - 1] - ahead) / width
    after = (total - csum[:, ks - 1]) / (n - ks)
    scale = np.maximum(np.asarray(sigma, float), 1e-9)[:, None] * np.sqrt(1.0 / width + 1.0 / (n - ks))
    stat = np.where(ks[None, :] > starts, (after - before) / scale, 0.0)
    best = np.abs(stat).argmax(axis=1)
    return ks[best], stat[np.arange(u.shape[0]), best]


def _segment_sums(rows):
    """Cumulative sums of y, y² and t·y with a leading zero along the last axis, for O(1)
    segment fits; ``rows`` (L,) or (A, L)."""
    rows = np.asarray(rows, float)
    t = np.arange(rows.shape[-1], dtype=float)
    zero = np.zeros(rows.shape[:-1] + (1,))
    return tuple(np.concatenate([zero, np.cumsum(m, axis=-1)], axis=-1) for m in (rows, rows * rows, t * rows))


def _step_and_line_sse(sums, a: int, m: int, c: int):
    """Residual sums of squares over columns a..c-1 of two means split at m, and of one line."""
    cy, cyy, cty = sums
    n = c - a
    sy, syy, sty = cy[c] - cy[a], cyy[c] - cyy[a], cty[c] - cty[a]
    st = (a + c - 1) * n / 2.0
    stt = ((c - 1) * c * (2 * c - 1) - (a - 1) * a * (2 * a - 1)) / 6.0
    left_n, right_n = m - a, c - m
    left_y, right_y = cy[m] - cy[a], cy[c] - cy[m]
    sse_step = syy - left_y**2 / left_n - right_y**2 / right_n
    sxx = stt - st * st / n
    sse_line = syy - sy * sy / n - ((sty - st * sy / n) ** 2 / sxx if sxx > 0 else 0.0)
    return max(sse_step, 0.0), max(sse_line, 0.0)


def drop_trend_breaks(row, breakpoints, sums=None) -> list[int]:
    """Remove the breakpoints a straight line explains better than a step: for each change, the
    two segments beside it are fitted as two means and as one line, and while some change's
    line has the lower BIC (Schwarz 1978: n ln(SSE / n) + p ln n, p = 3 for the step with its
    location, 2 for the line) the one with the largest advantage goes.  A steady trend cut into
    a staircase by a mean-change search is one segment again; a step stays.  ``breakpoints``
    and the result use ruptures' convention (segment ends, the last is ``len(row)``).  ``sums``:
    the row's :func:`_segment_sums`, when the caller has them for many rows at once."""
    row = np.asarray(row, float)
    kept = list(breakpoints[:-1])
    sums = _segment_sums(row) if sums is None else sums
    tiny = 1e-12 * max(1.0, float(np.abs(row).max(initial=0.0))) ** 2
    while kept:
        edges = [0] + kept + [row.size]
        best, best_gain = None, 0.0
        for i in range(1, len(edges) - 1):
            a, m, c = edges[i - 1], edges[i], edges[i + 1]
            n = c - a
            if n < 4:
                continue
            sse_step, sse_line = _step_and_line_sse(sums, a, m, c)
            gain = n * (np.log(max(sse_step, tiny) / n) - np.log(max(sse_line, tiny) / n)) + np.log(n)
            if gain > best_gain:
                best, best_gain = i - 1, gain
        if best is None:
            break
        del kept[best]
    return kept + [row.size]


class ChangepointSearch(Estimator):
    """PELT's L2 segmentation (Killick et al. 2012) through ruptures' C-coded
    ``KernelCPD(kernel="linear")``, which returns the same breakpoints much faster, then
    :func:`drop_trend_breaks` so that a steady trend is not read as a staircase of changes.

    The penalty is ``penalty_factor · σ² · ln n`` with σ each row's standard deviation: the
    per-change part of MBIC (Zhang & Siegmund 2007; ``../shared/METHODS.md``) on the series
    standardised to unit variance, which is how the published default runs of PELT and binary
    segmentation were made on TCPD (van den Burg & Williams 2020).  The whole row's spread,
    changes included, keeps the search to the changes that matter against everything the series
    does — a change found is a big one.  (A spread from first differences, tried before, is tiny
    on smooth series and cut a population curve into 406 segments.)

    Parameters
    ----------
    penalty_factor : float
    min_size : int
        Shortest segment in samples (ruptures binds the last segment too).
    """

    _parameters = ("penalty_factor", "min_size")

    def __init__(self, penalty_factor: float = 3.0, min_size: int = 2):
        self.penalty_factor = penalty_factor
        self.min_size = min_size

    def fit(self, signal):
        """Segment each row of ``signal`` (A, L); NaN is interpolated first.

        Sets ``breakpoints_`` (a list per account of segment ends, ruptures' convention: the last
        is L) and ``sigma_`` (A,).
        """
        if self.penalty_factor <= 0 or self.min_size < 1:
            raise ValueError("penalty_factor must be > 0 and min_size >= 1")
        signal = check_matrix(signal, "signal")
        filled = fill_gaps(signal)
        # A constant row has no change whatever the penalty; the floor only keeps it positive.
        sigma = np.maximum(filled.std(axis=1), 1e-9 * np.maximum(1.0, np.abs(filled).max(axis=1, initial=0.0)))
        # pelt_l2_rows answers "no change" itself for rows too short for one.
        log_n = np.log(max(filled.shape[1], 1))
        found = pelt_l2_rows(filled, self.penalty_factor * sigma * sigma * log_n, self.min_size)
        changed = [i for i, b in enumerate(found) if len(b) > 1]
        if changed:
            cy, cyy, cty = _segment_sums(filled[changed])
            for j, i in enumerate(changed):
                found[i] = drop_trend_breaks(filled[i], found[i], (cy[j], cyy[j], cty[j]))
        self.breakpoints_ = found
        self.sigma_ = sigma
        return self

    def last_change(self, signal=None):
        """Start column of the last segment per account (-1 when there is no change)."""
        self._check_fitted("breakpoints_")
        return np.array([b[-2] if len(b) >= 2 else -1 for b in self.breakpoints_])


def changepoints(values) -> list[int]:
    """Where a series changes: the 0-based first index of each new segment (no trailing n).

    ``values`` is one series (a sequence of numbers; NaN is a missing point, carried over).
    The search is the scan's own :class:`ChangepointSearch` at its one setting, so it can be
    tried on any labelled series.

    >>> changepoints([1.0, 1.1, 0.9, 1.0, 1.2, 0.8, 5.0, 5.1, 4.9, 5.2, 4.8, 5.0])
    [6]
    """
    row = np.asarray(values, dtype=float)
    if row.ndim != 1:
        raise ValueError(f"expected one series (a 1-d sequence), got shape {row.shape}")
    if row.size < 2 or not np.isfinite(row).any():
        return []
    return [int(b) for b in ChangepointSearch().fit(row[None, :]).breakpoints_[0][:-1]]
