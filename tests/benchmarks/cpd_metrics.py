"""TCPD's F1 (margin 5) and Cover, reimplemented from their published definition
(van den Burg & Williams 2020, "An Evaluation of Change Point Detection Algorithms"; stated
precisely in ../shared/data/tcpd/PUBLISHED.md §6, with worked examples in §7)."""

from __future__ import annotations


def clean_predictions(predictions, n: int) -> list[int]:
    """§6.1: integers, no duplicates, only 1 <= c <= n - 2."""
    return sorted({int(c) for c in predictions if 1 <= int(c) <= n - 2})


def _hits(truth, predictions, margin: int) -> int:
    """§6.2 step 2: truth points in ascending order, each takes the closest unused prediction
    within the (inclusive) margin, ties to the smaller prediction."""
    used = set()
    hits = 0
    for tau in sorted(truth):
        candidates = [x for x in predictions if x not in used and abs(tau - x) <= margin]
        if candidates:
            best = min(candidates, key=lambda x: (abs(tau - x), x))
            used.add(best)
            hits += 1
    return hits


def f1_score(annotations: dict, predictions, n: int, margin: int = 5) -> float:
    """§6.2: precision against the union of annotators, recall averaged over annotators; index 0
    is added to the predictions and to every annotator's set."""
    x = set(clean_predictions(predictions, n)) | {0}
    sets = [set(points) | {0} for points in annotations.values()]
    union = set().union(*sets)
    precision = _hits(union, sorted(x), margin) / len(x)
    recall = sum(_hits(t, sorted(x), margin) / len(t) for t in sets) / len(sets)
    return 0.0 if precision + recall == 0 else 2 * precision * recall / (precision + recall)


def _segments(points, n: int):
    cuts = sorted({int(c) for c in points if 0 < int(c) < n})
    bounds = [0, *cuts, n]
    return [(a, b) for a, b in zip(bounds, bounds[1:])]


def _cover_one(truth_points, predicted_points, n: int) -> float:
    predicted = _segments(predicted_points, n)
    total = 0.0
    for a, b in _segments(truth_points, n):
        best = 0.0
        for c, d in predicted:
            inter = max(0, min(b, d) - max(a, c))
            if inter:
                best = max(best, inter / (max(b, d) - min(a, c)))
        total += (b - a) * best
    return total / n


def cover_score(annotations: dict, predictions, n: int) -> float:
    """§6.3: segmentation covering of each annotator's partition by the predicted one, averaged."""
    predicted = clean_predictions(predictions, n)
    return sum(_cover_one(points, predicted, n) for points in annotations.values()) / len(annotations)
