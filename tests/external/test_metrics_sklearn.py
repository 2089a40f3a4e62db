"""Our window-level metrics agree with scikit-learn's on the same labels and scores.

Reference: scikit-learn, `sklearn.metrics.roc_auc_score`, `average_precision_score`
and `f1_score` (the library's documented definitions: ROC area with ties counted half;
average precision as sum_n (R_n - R_(n-1)) P_n without interpolation; F1 = 2PR/(P+R)).
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

sk_metrics = pytest.importorskip("sklearn.metrics", reason="scikit-learn is the reference here (dev extra)")

from training.metrics import average_precision, f1_score, point_adjust, roc_auc  # noqa: E402


def _cases() -> list[tuple[np.ndarray, np.ndarray]]:
    rng = np.random.default_rng(5)
    out = []
    for n, p_pos, levels in [(50, 0.3, None), (400, 0.05, None), (300, 0.5, 7), (1000, 0.1, 3)]:
        y = rng.random(n) < p_pos
        y[0], y[1] = True, False
        s = rng.normal(size=n) + 1.2 * y
        if levels is not None:  # many ties
            s = np.round(s * levels / 4) / levels
        out.append((y, s))
    return out


@pytest.mark.parametrize("case", range(4))
def test_roc_auc_matches_sklearn(case: int) -> None:
    y, s = _cases()[case]
    # Reference: sklearn.metrics.roc_auc_score.
    assert roc_auc(y, s) == pytest.approx(sk_metrics.roc_auc_score(y, s), abs=1e-12)


@pytest.mark.parametrize("case", range(4))
def test_average_precision_matches_sklearn(case: int) -> None:
    y, s = _cases()[case]
    # Reference: sklearn.metrics.average_precision_score.
    assert average_precision(y, s) == pytest.approx(sk_metrics.average_precision_score(y, s), abs=1e-12)


@settings(max_examples=80, deadline=None)
@given(
    st.lists(st.tuples(st.booleans(), st.integers(min_value=0, max_value=6)), min_size=2, max_size=40).filter(
        lambda xs: any(a for a, _ in xs) and not all(a for a, _ in xs)
    )
)
def test_ranking_metrics_match_sklearn_on_tied_small_samples(pairs: list[tuple[bool, int]]) -> None:
    y = np.array([a for a, _ in pairs])
    s = np.array([b for _, b in pairs], dtype=np.float64)
    # Reference: sklearn.metrics.roc_auc_score / average_precision_score.
    assert roc_auc(y, s) == pytest.approx(sk_metrics.roc_auc_score(y, s), abs=1e-12)
    assert average_precision(y, s) == pytest.approx(sk_metrics.average_precision_score(y, s), abs=1e-12)


@settings(max_examples=80, deadline=None)
@given(st.lists(st.tuples(st.booleans(), st.booleans()), min_size=1, max_size=50))
def test_f1_matches_sklearn_plain_and_point_adjusted(pairs: list[tuple[bool, bool]]) -> None:
    y = np.array([a for a, _ in pairs])
    p = np.array([b for _, b in pairs])
    # Reference: sklearn.metrics.f1_score (zero_division=0 for the all-negative case).
    assert f1_score(y, p) == pytest.approx(sk_metrics.f1_score(y, p, zero_division=0.0))
    adjusted = point_adjust(y, p)
    assert f1_score(y, adjusted) == pytest.approx(sk_metrics.f1_score(y, adjusted, zero_division=0.0))
