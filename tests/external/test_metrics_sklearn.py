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


def _normal_windows(n: int = 300, w: int = 12, c: int = 3) -> np.ndarray:
    rng = np.random.default_rng(11)
    t = np.arange(w)
    phase = rng.uniform(0, 2 * np.pi, size=(n, 1, 1))
    base = np.sin(2 * np.pi * t[None, :, None] / w + phase) * np.array([1.0, 0.5, 2.0])
    return base + 0.1 * rng.normal(size=(n, w, c))


def test_pca_baseline_reconstruction_matches_sklearn_pca() -> None:
    from sklearn.decomposition import PCA

    from training.baselines import PcaReconstruction

    train = _normal_windows()
    test = _normal_windows(40) + np.linspace(0, 1, 40)[:, None, None]
    ours = PcaReconstruction().fit(train)
    k = ours.n_components
    assert 1 <= k < train.shape[1] * train.shape[2]
    # Reference: sklearn.decomposition.PCA with the same number of components; the squared
    # reconstruction error of the centred, flattened window is the same number.
    ref = PCA(n_components=k, svd_solver="full").fit(train.reshape(len(train), -1))
    flat = test.reshape(len(test), -1)
    ref_err = np.mean((flat - ref.inverse_transform(ref.transform(flat))) ** 2, axis=1)
    np.testing.assert_allclose(ours.score(test), ref_err, rtol=1e-8, atol=1e-12)
    # Reference: sklearn's explained_variance_ratio_ — k is the fewest reaching 90%.
    ratio = np.cumsum(PCA(svd_solver="full").fit(train.reshape(len(train), -1)).explained_variance_ratio_)
    assert ratio[k - 1] >= 0.90 and (k == 1 or ratio[k - 2] < 0.90)


def test_robust_z_spread_matches_scipy_mad() -> None:
    from scipy.stats import median_abs_deviation

    from training.baselines import RobustZ

    train = _normal_windows()
    rz = RobustZ().fit(train)
    points = train.reshape(-1, train.shape[2])
    # Reference: scipy.stats.median_abs_deviation(scale="normal") (MAD / 0.67449).
    np.testing.assert_allclose(rz.sigma, median_abs_deviation(points, axis=0, scale="normal"), rtol=1e-4)


def test_isolation_forest_baseline_ranks_shifted_windows_higher() -> None:
    from training.baselines import IsolationForestSummary

    train = _normal_windows()
    shifted = _normal_windows(50) + 1.5
    forest = IsolationForestSummary(seed=0, n_estimators=50).fit(train)
    scores = np.r_[forest.score(_normal_windows(50)), forest.score(shifted)]
    labels = np.r_[np.zeros(50), np.ones(50)]
    # Reference: sklearn.ensemble.IsolationForest's score_samples (lower = more abnormal),
    # and sklearn.metrics.roc_auc_score for the separation.
    assert np.all(scores > 0)
    assert sk_metrics.roc_auc_score(labels, scores) > 0.95
