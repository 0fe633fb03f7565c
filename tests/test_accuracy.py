"""Accuracy and calibration on the planted-truth families (tests/benchmarks/fleets), small
versions of ``tests/benchmarks/accuracy.py`` so that a regression in detection fails CI.

Family A is the one detection is developed on; B, C and D are held out.  Every fleet runs end to
end through ``ingest --daily`` and ``scan`` (the library calls the CLI makes).  Seeds here are
not the benchmark's, so the floors are not fitted to the benchmark's fleets.
"""

from __future__ import annotations

import numpy as np
import pytest

from .benchmarks import planted
from .benchmarks.fleets import DEV_FAMILY, HELD_OUT, generate
from .benchmarks.rules import hand_rule

ALPHAS = (0.001, 0.01, 0.05, 0.1)
QUIET_SEEDS = (200, 201, 202, 203)


def _quiet_p_values(family, tmp_path_factory):
    """Per quiet-only fleet of the family: its judged accounts' (p_down, p_up)."""
    runs = []
    for seed in QUIET_SEEDS:
        fleet = generate(family, 300, seed, share_changed=0.0)
        _, scores = planted.run_ebbwatch(fleet, tmp_path_factory.mktemp(f"q{family}{seed}"))
        cal = planted.calibration(fleet.truth, scores)
        runs.append((cal["p_down"], cal["p_up"]))
    return runs


def _shares(runs, alpha, side):
    """The pooled share of p below alpha, and its standard error: binomial, or from the spread
    between fleets when larger (a fleet's accounts share its fleet-wide days, so they are not
    independent draws)."""
    per_fleet = np.array([np.mean(run[side] < alpha) for run in runs])
    sizes = np.array([len(run[side]) for run in runs])
    share = float((per_fleet * sizes).sum() / sizes.sum())
    se = max(np.sqrt(alpha * (1 - alpha) / sizes.sum()), per_fleet.std(ddof=1) / np.sqrt(len(runs)))
    return share, se


@pytest.fixture(scope="module")
def quiet(tmp_path_factory):
    return {family: _quiet_p_values(family, tmp_path_factory) for family in (DEV_FAMILY, *HELD_OUT)}


@pytest.mark.parametrize("alpha", ALPHAS)
@pytest.mark.parametrize("side", [0, 1], ids=["down", "up"])
def test_p_values_are_calibrated_on_quiet_accounts_of_the_development_family(quiet, alpha, side):
    """Reference: the uniform distribution; on quiet accounts the share with p < alpha is alpha
    within sampling error (4 standard errors, 1,200 accounts in four fleets).

    One case misses that target and is pinned instead, not passed: rising p-values at 0.05.
    Measured 2026-12-05 on twelve quiet fleets of the family (seeds 200-211, 3,567 accounts),
    the share below 0.05 is 0.031 (0.027 before the upper tail followed its own half of the
    history, 2026-12-04; five standard errors below 0.05): too few,
    because a history whose upper tail is lighter than the Student-t is never allowed to make
    the tail lighter than the t (``calibrate.tail_p``), which held-out family C needs.  Here it
    may not fall under 0.35 alpha nor rise above the target's upper limit."""
    share, se = _shares(quiet[DEV_FAMILY], alpha, side)
    if (side, alpha) == (1, 0.05):
        assert 0.35 * alpha <= share <= alpha + 4 * se, f"{share:.4f} against {alpha} (se {se:.4f})"
        return
    assert abs(share - alpha) <= 4 * se, f"{share:.4f} against {alpha} (se {se:.4f})"


@pytest.mark.parametrize("family", HELD_OUT)
def test_calibration_on_held_out_families_stays_where_it_was_measured(quiet, family):
    """Not the target.  The target is "within sampling error" on every family, and on the
    held-out families it is missed: measured 2026-12-05 (1,180-1,193 quiet accounts each, both
    directions), the share below alpha is 0.8-9.3 times alpha at 0.001, 0.85-3.0 times at 0.01,
    0.42-1.30 times at 0.05 and 0.36-1.22 times at 0.1 (the 0.36: C's falling p-values, made more
    conservative when the growth rate stopped being subtracted).  This pins those measurements
    against getting worse: at most 12, 3.5, 1.6 and 1.6 times alpha, at least 0.33 times at 0.05
    and 0.1.  (That floor was 0.35 until young accounts' own weeks began to count, 2026-12-05:
    C's falling share at 0.1 went 0.0356 -> 0.0347, 42 -> 41 of 1,180 quiet accounts; of the 103
    young accounts whose p-value moved, 7 -> 6 fell below 0.1, the median moved by a factor 0.999.
    A floor one account from its measurement cannot tell noise from a regression.)"""
    runs = quiet[family]
    for side in (0, 1):
        for alpha, high in ((0.001, 12.0), (0.01, 3.5), (0.05, 1.6), (0.1, 1.6)):
            share, _ = _shares(runs, alpha, side)
            assert share <= high * alpha, (family, side, alpha, share)
            if alpha >= 0.05:
                assert share >= 0.33 * alpha, (family, side, alpha, share)


@pytest.fixture(scope="module")
def development_runs(tmp_path_factory):
    ours, hand = {}, {}
    for seed in (300, 301):
        fleet = generate(DEV_FAMILY, 400, seed)
        flags, _ = planted.run_ebbwatch(fleet, tmp_path_factory.mktemp(f"a{seed}"))
        planted.add(ours, planted.recall(fleet.truth, flags))
        # The hand rule loosened to |z| > 1 (common practice's rule set to catch more).
        rule = dict(zip(fleet.accounts, hand_rule(fleet.counts.astype(float), threshold=1.0)))
        planted.add(hand, planted.recall(fleet.truth, rule))
    return ours, hand


@pytest.mark.parametrize("kind, floor", [("drop", 0.85), ("stop", 0.95), ("slide", 0.78), ("surge", 0.8)])
def test_recall_on_the_development_family(development_runs, kind, floor):
    """Measured 2026-12-04 on these fleets: drops 41/45, stops 48/48, slides 42/49, surges 31/36."""
    hit, n = development_runs[0][kind]
    assert hit / n >= floor, f"{kind}: {hit}/{n}"


def test_quiet_accounts_rarely_flagged(development_runs):
    hit, n = development_runs[0]["quiet"]
    assert hit / n <= 0.015, f"{hit}/{n}"


def test_more_caught_and_fewer_false_alerts_than_the_hand_rule(development_runs):
    ours, hand = development_runs
    kinds = ("drop", "stop", "slide", "surge")
    assert sum(ours[k][0] for k in kinds) >= 2 * sum(hand[k][0] for k in kinds)
    assert 2 * ours["quiet"][0] <= hand["quiet"][0]


def test_the_priors_of_a_fleet_too_small_to_measure_them_follow_the_measured_ones():
    """Reference: the window priors measured on 400-account fleets of the development family.
    A fleet with under 20 long histories cannot measure its own, and takes
    ``contrasts.neutral_priors``: each window's spread against the week's within 0.7-1.4 times the
    measured (they go as (7/k)^0.85; measured 0.79-1.05 of them, 2026-12-05), and its excess beyond
    count noise not below the measured nor over three times it (measured 1.24-2.58 times), so a
    small fleet's long windows are not judged as widely as its week nor its two-day windows as
    narrowly (until 2026-12-05 every window took the week's spread: 0.28 times the measured
    two-day ratio, 3.4 times the 28-day one)."""
    from ebbwatch.detect import ScanParams, fleet_window_priors
    from ebbwatch.detect.contrasts import neutral_priors
    from ebbwatch.fleet import fleet_factor

    for seed in (500, 501):
        fleet = generate(DEV_FAMILY, 400, seed)
        counts = fleet.counts.astype(float)
        first_full = np.array([(day - fleet.start).days + 1 for day in fleet.truth["first_day"]])
        factor, masked = fleet_factor(counts)
        measured = fleet_window_priors(counts, factor, masked, np.arange(fleet.n_days), ScanParams(),
                                       first_full_day=first_full)
        neutral = neutral_priors(measured.windows)
        ratio = np.array(neutral.ratio) / np.array(measured.ratio)
        excess = np.array(neutral.excess) / np.array(measured.excess)
        assert ((ratio >= 0.7) & (ratio <= 1.4)).all(), (seed, measured.windows, ratio)
        assert ((excess >= 1.0) & (excess <= 3.0)).all(), (seed, measured.windows, excess)


@pytest.fixture(scope="module")
def young_store_quiet(tmp_path_factory):
    """Per quiet fleet of the development family with only its last 100 days of data (every
    account young, the window priors neutral and set by its young accounts' own weeks): the
    (p_down, p_up) of the accounts whose old level shift or season does not fall inside them."""
    from .benchmarks.accuracy import CHANGES_IN_A_SHORT_STORE

    runs = []
    for seed in (210, 211):
        fleet = generate(DEV_FAMILY, 300, seed, share_changed=0.0, n_days=100)
        _, scores = planted.run_ebbwatch(fleet, tmp_path_factory.mktemp(f"young{seed}"))
        steady = fleet.truth[~fleet.truth["traits"].str.contains("|".join(CHANGES_IN_A_SHORT_STORE))]
        cal = planted.calibration(steady, scores)
        runs.append((cal["p_down"], cal["p_up"]))
    return runs


@pytest.mark.parametrize("alpha", ALPHAS)
@pytest.mark.parametrize("side", [0, 1], ids=["down", "up"])
def test_a_young_store_raises_no_more_than_alpha(young_store_quiet, alpha, side):
    """Reference: the uniform distribution.  In a store of 100 days the accounts' own weeks set
    both their spread and the fleet's neutral prior; quiet accounts may then be judged
    conservatively (measured 2026-12-05, two fleets of 300: 0.004-0.009 below 0.01, 0.021-0.094
    below 0.1) but never fall under alpha more often than sampling error allows."""
    share, se = _shares(young_store_quiet, alpha, side)
    assert share <= alpha + 4 * se, f"{share:.4f} against {alpha} (se {se:.4f})"
