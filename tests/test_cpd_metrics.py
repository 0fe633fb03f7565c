"""TCPD's F1 and Cover against the worked examples of ../shared/data/tcpd/PUBLISHED.md §7
(van den Burg & Williams 2020; Ex. D is a published value for nile, default binseg).  The
examples are quoted here, so this test needs no shared data."""

import pytest

from .benchmarks.cpd_metrics import cover_score, f1_score


def test_example_a_three_annotators_cleanup_and_margin():
    assert f1_score({"a": [20, 40], "b": [22], "c": []}, [21, 47, 59], 60) == pytest.approx(0.761905, abs=1e-6)


@pytest.mark.parametrize("predictions, expected", [([45, 46, 56], 2 / 3), ([55], 1.0), ([56], 0.5), ([0, 45, 99], 1.0)])
def test_example_b_margin_edge_and_one_to_one(predictions, expected):
    assert f1_score({"a": [50]}, predictions, 100) == pytest.approx(expected)


def test_example_c_cover_differs_from_f1():
    ann = {"a": [8], "b": [12], "c": []}
    assert cover_score(ann, [10], 20) == pytest.approx(0.713333, abs=1e-6)
    assert f1_score(ann, [10], 20) == pytest.approx(1.0)
    assert cover_score(ann, [], 20) == pytest.approx(0.68)
    assert f1_score(ann, [], 20) == pytest.approx(0.8)


def test_example_d_published_nile_binseg():
    ann = {"6": [], "7": [28], "8": [], "12": [28], "13": [28]}
    assert f1_score(ann, [27, 99], 100) == 1.0
    assert cover_score(ann, [27, 99], 100) == pytest.approx(0.8800821917808218, abs=1e-12)
    assert cover_score(ann, [28], 100) == pytest.approx(0.888)


def test_ascending_visiting_order():
    # PUBLISHED.md §6.2: annotator [10, 14], predictions [12, 17]: ascending order gives F1 = 1.
    assert f1_score({"a": [10, 14]}, [12, 17], 40) == pytest.approx(1.0)
