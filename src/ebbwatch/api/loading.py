"""Reading account blocks for the scan and the replay: the panel loader, its fleet-wide fit, and
the Dask engine's exchange of blocks."""

from __future__ import annotations

from contextlib import contextmanager
from datetime import date

import numpy as np

from ..alerts import day_to_date
from ..config import Config
from ..series import NEVER_ACTIVE
from .common import _scan_params


FLEET_SAMPLE_ACCOUNTS = 5_000
FLEET_SAMPLE_RUNS = 100


def fleet_sample(accounts: list[str]) -> tuple[list[str], list[tuple[str, str]]]:
    """The accounts fleet-wide quantities are measured on, and their id ranges: up to
    ``FLEET_SAMPLE_ACCOUNTS``, as ``FLEET_SAMPLE_RUNS`` runs of consecutive ids spread evenly
    over the sorted ``accounts``.  Runs rather than every k-th id: DuckDB reads narrow ranges
    of a table kept in account order without scanning the rest (0.08-0.17 s instead of 0.37 s
    on the 100k-account scan benchmark), and a table in another order costs one scan either
    way.  Runs of 50 keep the sample nearly as spread as every k-th id."""
    accounts = list(accounts)
    if len(accounts) <= FLEET_SAMPLE_ACCOUNTS:
        return accounts, [(min(accounts), max(accounts))] if accounts else []
    size = FLEET_SAMPLE_ACCOUNTS // FLEET_SAMPLE_RUNS
    starts = np.linspace(0, len(accounts) - size, FLEET_SAMPLE_RUNS).astype(int)
    runs = [accounts[s:s + size] for s in starts]
    return [a for run in runs for a in run], [(min(run), max(run)) for run in runs]


class PanelLoader:
    """Reads account blocks from an open store into :class:`series.Panel` objects."""

    def __init__(self, st, cfg: Config, as_of: date, history_days: int):
        from ..series import resolve_event_weights

        self.st = st
        self.cfg = cfg
        self.end_day = (as_of - date(1970, 1, 1)).days
        self.start_day = self.end_day - history_days + 1
        self.weights = resolve_event_weights(st.event_names(), cfg.index.weights, cfg.index.exclude)
        meta = st.accounts().set_index("account")
        self.names = meta["name"].dropna().to_dict()
        self.seats = meta["seats"].to_dict()
        self.mrr = meta["mrr"].dropna().to_dict()
        self.fleet_factor = None
        self.masked = None
        self.count_dispersion = None
        self.window_priors = None
        self.fleet_voters = 0
        self._fleet_fit = None  # a Future while the fit runs in the background
        self._first_full = None
        self.first_full()  # before any thread reads blocks or fits the fleet

    def first_full(self, st=None) -> dict:
        """``{account: first full day}`` (day numbers, ``series.first_full_days``) from the whole
        store, not only the loader's window, so every window judges an account alike; read once."""
        from ..series import first_full_days

        if self._first_full is None:
            st = st or self.st
            first_active = st.first_active_days(self.weights)
            start = st.first_day()
            data_start = (start - date(1970, 1, 1)).days if start is not None else 0
            days = first_full_days(np.fromiter(first_active.values(), np.int64, len(first_active)), data_start)
            self._first_full = dict(zip(first_active, days.tolist()))
        return self._first_full

    def first_full_of(self, accounts, st=None) -> np.ndarray:
        """The first full day of each of ``accounts`` (A,); a far-future day for one never active."""
        first = self.first_full(st)
        return np.array([first.get(a, NEVER_ACTIVE) for a in accounts], dtype=np.int64)

    def _counts(self, accounts, ranges=None, st=None) -> np.ndarray:
        """Raw weighted totals (A, D) of ``accounts`` over the loader's days.  ``ranges``: id
        ranges holding the accounts (``Store.index_cells``); ``st``: the store handle to read
        through (default the loader's own)."""
        from ..series import cells_matrix

        st = st or self.st
        cell, value = st.index_cells(self.weights, list(accounts), day_to_date(self.start_day),
                                     day_to_date(self.end_day), ranges)
        return cells_matrix(cell, value, len(accounts), self.end_day - self.start_day + 1)

    def sample_counts(self, accounts, st=None) -> np.ndarray:
        """Raw weighted totals (S, D) of the fleet sample (:func:`fleet_sample`) of ``accounts``."""
        sample, ranges = fleet_sample(accounts)
        return self._counts(sample, ranges=ranges, st=st)

    def fit_fleet_in_background(self, accounts):
        """Start :meth:`fit_fleet` in a thread of its own, on a cursor of the store (closed when
        the fit ends), so the first chunks are read meanwhile; :meth:`with_fleet` (and
        ``__call__``) wait for it.  Wait with :meth:`wait_for_fleet` before closing the store."""
        from concurrent.futures import ThreadPoolExecutor

        cursor = self.st.cursor()

        def fit():
            try:
                self.fit_fleet(accounts, cursor)
            finally:
                cursor.close()

        pool = ThreadPoolExecutor(1, thread_name_prefix="ebbwatch-fleet")
        self._fleet_fit = pool.submit(fit)
        pool.shutdown(wait=False)  # the fit still runs; the thread ends with it
        return self

    def wait_for_fleet(self):
        """Wait for a :meth:`fit_fleet_in_background` (re-raising its error); no-op otherwise."""
        if self._fleet_fit is not None:
            self._fleet_fit.result()
        return self

    def fit_fleet(self, accounts, st=None):
        """Measure the fleet-wide quantities (factor, gap mask, count dispersion) on the fleet
        sample of ``accounts``, read through ``st`` (default the loader's store)."""
        from ..baseline.counts import pooled_dispersion
        from ..detect import fleet_window_priors
        from ..fleet import fleet_factor_and_voters
        from ..series import missing_before_first_full_day

        counts = self.sample_counts(accounts, st)
        sample, _ = fleet_sample(accounts)
        first_full = self.first_full_of(sample, st)
        self.fleet_factor, self.masked, self.fleet_voters = fleet_factor_and_voters(counts)
        # The same fleet-wide count dispersion and window priors for every chunk (see
        # backtest.replay_fleet_factors).
        started = missing_before_first_full_day(counts, first_full - self.start_day)
        started[:, self.masked] = np.nan
        self.count_dispersion = pooled_dispersion(started, window=self.cfg.scan.window_days)
        self.window_priors = fleet_window_priors(counts, self.fleet_factor, self.masked,
                                                 np.arange(self.start_day, self.end_day + 1), _scan_params(self.cfg),
                                                 first_full_day=first_full)
        return self

    def read(self, accounts):
        """The block's :class:`series.Panel` without the fleet-wide factor and gap mask, which
        :meth:`with_fleet` adds (so a block can be read while the fleet fit runs)."""
        from ..series import build_panel, panel_from_counts

        seats = [self.seats.get(a) for a in accounts]
        settings = dict(accounts=accounts, start_day=self.start_day, normalise=self.cfg.index.normalise,
                        seats=np.array([np.nan if s is None else s for s in seats], float),
                        first_full_day=self.first_full_of(accounts))
        if self.cfg.index.normalise == "active_users":
            idx, day, value, events, users = self.st.weighted_daily(
                self.weights, list(accounts), day_to_date(self.start_day), day_to_date(self.end_day))
            return build_panel(idx, day, value, events, users, end_day=self.end_day, **settings)
        return panel_from_counts(self._counts(accounts), **settings)

    def with_fleet(self, panel):
        """A panel from :meth:`read` with the fleet factor and gap mask applied (waiting for a
        fit in the background first)."""
        from ..series import with_fleet

        self.wait_for_fleet()
        return with_fleet(panel, self.fleet_factor, self.masked)

    def __call__(self, accounts):
        return self.with_fleet(self.read(accounts))


def _blocks(accounts: list[str], size: int) -> list[tuple[int, list[str]]]:
    """``(part, accounts)`` pairs: the account blocks ``Store.export_index_parts`` writes."""
    from ..engine import chunked

    return list(enumerate(chunked(list(accounts), size)))


@contextmanager
def _exchange(st, loader, accounts_per_part: int, shared_dir: str | None):
    """The store's index for ``loader``'s window, exported as Parquet blocks into a fresh folder
    (inside ``shared_dir`` when given: it must be readable by every worker), removed afterwards."""
    import tempfile

    with tempfile.TemporaryDirectory(prefix="ebbwatch-exchange-", dir=shared_dir) as directory:
        st.export_index_parts(directory, loader.weights, day_to_date(loader.start_day), day_to_date(loader.end_day),
                              accounts_per_part)
        yield directory


def _on_dask(scheduler, task, blocks, progress, block_size: int, n_accounts: int):
    """``task`` over account ``blocks`` on the cluster; progress is counted in accounts."""
    from ..engine.dask import dask_client, map_dask

    in_accounts = None if progress is None else (
        lambda done, _: progress(min(done * block_size, n_accounts), n_accounts))
    with dask_client(scheduler) as client:
        return map_dask(client, task, blocks, progress=in_accounts)


def _seats(loader) -> dict:
    return {a: s for a, s in loader.seats.items() if s == s}


def _score_on_dask(st, loader, accounts, params, chunk_size, scheduler, progress, shared_dir=None):
    import functools

    from ..engine.dask import concat_accounts
    from ..tasks import score_part

    blocks = _blocks(accounts, chunk_size)
    with _exchange(st, loader, chunk_size, shared_dir) as directory:
        task = functools.partial(score_part, directory=directory, start_day=loader.start_day, end_day=loader.end_day,
                                 normalise=loader.cfg.index.normalise, seats=_seats(loader),
                                 fleet_factor=loader.fleet_factor, masked=loader.masked, params=params,
                                 first_full=loader.first_full())
        return concat_accounts(_on_dask(scheduler, task, blocks, progress, chunk_size, len(accounts)), accounts)
