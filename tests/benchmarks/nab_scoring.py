"""NAB's scoring of one file, reimplemented from its description (Lavin & Ahmad 2015; stated in
../shared/data/nab/SCORING.md §2-§5): windows, the scaled sigmoid, profile weights."""

from __future__ import annotations

import math

STANDARD = {"tp": 1.0, "fp": 0.11, "fn": 1.0}


def scaled_sigmoid(y: float) -> float:
    """A(y) = 2 / (1 + e^(5y)) - 1 for y <= 3, else -1 (SCORING.md §2)."""
    if y > 3:
        return -1.0
    return 2.0 / (1.0 + math.exp(5.0 * y)) - 1.0


def score_file(detections: list[int], windows: list[tuple[int, int]], n_rows: int, profile=STANDARD) -> dict:
    """Raw NAB score of one file.  ``detections``: row indices flagged; ``windows``: inclusive
    (first, last) row index pairs, sorted; rows in the probationary period are ignored."""
    probation = min(int(0.15 * n_rows), 750)
    a_minus_1 = scaled_sigmoid(-1.0)
    best = {k: None for k in range(len(windows))}
    false_positive = 0.0
    for i in sorted(d for d in detections if d >= probation):
        inside = [k for k, (a, b) in enumerate(windows) if a <= i <= b]
        if inside:
            k = inside[0]
            a, b = windows[k]
            width = b - a + 1
            score = profile["tp"] * scaled_sigmoid(-(b - i + 1) / width) / a_minus_1
            if best[k] is None or score > best[k]:
                best[k] = score
            continue
        before = [k for k, (a, b) in enumerate(windows) if b < i]
        if not before:
            false_positive -= profile["fp"]
            continue
        a, b = windows[before[-1]]
        width = b - a + 1
        false_positive += profile["fp"] * scaled_sigmoid((i - b) / (width - 1))
    window_part = sum(-profile["fn"] if s is None else s for s in best.values())
    return {"score": window_part + false_positive, "windows_hit": sum(s is not None for s in best.values()),
            "per_window": [s for s in best.values()], "false_positive_part": false_positive}
