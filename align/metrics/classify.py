"""Classification from embeddings: zero-shot by prompt ensembling, the linear probe on a bounded
stratified sample of training rows, and the confusion matrix of either.

Image rows are scored ``block`` at a time, so an (N, D) float32 copy of the images is never made
here: the caller may pass a memory map or the one array it already holds.
"""
from __future__ import annotations

from typing import Callable, Sequence

import numpy as np

from .blocked import DEFAULT_BLOCK


def _l2_normalise(x: np.ndarray) -> np.ndarray:
    # The floor keeps an all-zero row at zero instead of NaN (same guard as torch's F.normalize).
    return x / np.maximum(np.linalg.norm(x, axis=-1, keepdims=True), 1e-12)


def display_name(label_value: str) -> str:
    """A label value as words for a prompt: "fish_scale" -> "fish scale" (whitespace collapsed)."""
    return " ".join(str(label_value).replace("_", " ").split())


def class_text_embeddings(embed_text: Callable[[list[str]], np.ndarray], class_names: list[str],
                          templates: list[str]) -> np.ndarray:
    """(C, D) class embeddings by prompt ensembling (Radford et al. 2021, §3.1.4).

    Every ``template.format(name)`` is embedded (one call to ``embed_text`` for all C × T prompts),
    each prompt embedding is L2-normalised, the T of a class are averaged in embedding space, and
    the mean is L2-normalised again.
    """
    if not class_names:
        raise ValueError("no class names to embed (zero-shot needs at least one class)")
    if not templates:
        raise ValueError('no prompt templates (give at least one, e.g. "a photo of {}.")')
    for template in templates:
        if "{}" not in template:
            raise ValueError(f"prompt template {template!r} has no '{{}}' for the class name")
    prompts = [template.format(name) for name in class_names for template in templates]   # class-major
    embedded = np.asarray(embed_text(prompts), dtype=np.float32)                  # (C*T, D)
    if embedded.ndim != 2 or embedded.shape[0] != len(prompts):
        raise ValueError(f"the text embedder returned shape {embedded.shape} for {len(prompts)} prompts "
                         "(embed_text must return one row per prompt)")
    per_prompt = _l2_normalise(embedded).reshape(len(class_names), len(templates), -1)  # (C, T, D)
    return _l2_normalise(per_prompt.mean(axis=1))                                 # (C, D)


def zero_shot_predictions(image_emb: np.ndarray, class_emb: np.ndarray, block: int = DEFAULT_BLOCK) -> np.ndarray:
    """The class each image is most similar to (ties: lower class index), ``block`` images at a time. (N,) int"""
    classes = np.asarray(class_emb, dtype=np.float32)                             # (C, D)
    image = image_emb if isinstance(image_emb, np.ndarray) else np.asarray(image_emb)
    if image.ndim != 2 or classes.ndim != 2 or image.shape[1] != classes.shape[1]:
        raise ValueError(f"image embeddings {image.shape} and class embeddings {classes.shape} must be "
                         f"(N, D) and (C, D) with the same D")
    out = np.empty(image.shape[0], dtype=np.int64)
    step = max(1, int(block))
    for start in range(0, image.shape[0], step):
        rows = np.asarray(image[start:start + step], dtype=np.float32)           # (b, D)
        out[start:start + step] = (rows @ classes.T).argmax(axis=1)               # (b,)
    return out


def zero_shot_accuracy(image_emb: np.ndarray, class_emb: np.ndarray, labels: Sequence[int],
                       block: int = DEFAULT_BLOCK) -> float:
    """Fraction of images whose most similar class embedding is their label (ties: lower class index)."""
    image = image_emb if isinstance(image_emb, np.ndarray) else np.asarray(image_emb, dtype=np.float32)
    classes = np.asarray(class_emb, dtype=np.float32)
    labels = np.asarray(labels)
    if image.ndim != 2 or classes.ndim != 2 or image.shape[1] != classes.shape[1]:
        raise ValueError(f"image embeddings {image.shape} and class embeddings {classes.shape} must be "
                         f"(N, D) and (C, D) with the same D")
    if labels.shape != (image.shape[0],):
        raise ValueError(f"{image.shape[0]} images but {labels.size} labels (give one label per image)")
    if image.shape[0] == 0:
        raise ValueError("no images to classify")
    if not np.issubdtype(labels.dtype, np.integer) or (labels < 0).any() or (labels >= classes.shape[0]).any():
        raise ValueError(f"labels must be class indices 0..{classes.shape[0] - 1}")
    return float((zero_shot_predictions(image, classes, block) == labels).mean())


def stratified_sample(labels: Sequence, size: int, seed: int) -> np.ndarray:
    """At most ``size`` row indices (ascending) keeping each class's share of ``labels``; all rows when
    there are no more than ``size`` (or ``size`` is 0).

    Each class gets its share ``size * count / n`` rounded down, every class at least one row while
    there are no more classes than ``size``, and the rows left over go to the largest remainders
    (ties: the class first in sorted order), so each class is within one row of its share unless
    keeping one row of every rare class pushes the largest below theirs. Rows are drawn without
    replacement from ``numpy.random.default_rng(seed)``, class by class in sorted order.
    """
    labels = np.asarray(labels)
    n = labels.shape[0]
    if size < 0:
        raise ValueError(f"the probe sample size must be 0 (every row) or positive, got {size}")
    if size == 0 or n <= size:
        return np.arange(n)
    classes, inverse, counts = np.unique(labels, return_inverse=True, return_counts=True)
    share = size * counts / n                                                     # (C,) float
    quota = np.floor(share).astype(np.int64)
    if len(classes) <= size:
        quota = np.maximum(quota, 1)
    left = size - int(quota.sum())
    if left > 0:  # the largest remainders first; a stable sort keeps the sorted class order on ties
        quota[np.argsort(-(share - quota), kind="stable")[:left]] += 1
    while left < 0:  # the one-row floors overshot: take back from the largest quotas
        largest = int(np.argmax(quota))
        quota[largest] -= 1
        left += 1
    rng = np.random.default_rng(seed)
    picked = [rng.choice(np.flatnonzero(inverse == c), int(q), replace=False) for c, q in enumerate(quota) if q]
    return np.sort(np.concatenate(picked))


def linear_probe_accuracy(train_x: np.ndarray, train_y: Sequence, test_x: np.ndarray, test_y: Sequence,
                          C: float = 1.0, max_iter: int = 1000, seed: int = 0,
                          test_rows: Sequence[int] | None = None, block: int = DEFAULT_BLOCK) -> float:
    """Test accuracy of a multinomial logistic regression on frozen features.

    Features are standardised with a StandardScaler fit on the training rows only; the classifier
    is scikit-learn's LogisticRegression (lbfgs; multinomial for more than two classes). A test
    class never seen in training cannot be predicted, so those rows count as wrong. ``test_rows``
    picks the rows of ``test_x`` that ``test_y`` labels (default: all); they are predicted
    ``block`` at a time, so ``test_x`` may be a memory map or a large array that is never copied whole.
    """
    # Imported here: scikit-learn takes about a second to import and only the probe needs it.
    from sklearn.linear_model import LogisticRegression
    from sklearn.preprocessing import StandardScaler

    train_x = np.asarray(train_x, dtype=np.float64)
    test_x = test_x if isinstance(test_x, np.ndarray) else np.asarray(test_x, dtype=np.float64)
    rows = np.arange(test_x.shape[0]) if test_rows is None else np.asarray(test_rows, dtype=np.int64)
    train_y, test_y = np.asarray(train_y), np.asarray(test_y)
    if train_x.ndim != 2 or test_x.ndim != 2 or train_x.shape[1] != test_x.shape[1]:
        raise ValueError(f"probe features must be (n, D) with one D, got {train_x.shape} and {test_x.shape}")
    if train_y.shape != (train_x.shape[0],) or test_y.shape != rows.shape:
        raise ValueError("give one probe label per feature row")
    if rows.size == 0:
        raise ValueError("no test rows for the linear probe")
    if np.unique(train_y).size < 2:
        raise ValueError(f"the linear probe needs at least two classes in the training rows, found "
                         f"{np.unique(train_y).size}")
    scaler = StandardScaler().fit(train_x)
    probe = LogisticRegression(C=C, max_iter=max_iter, solver="lbfgs", random_state=seed)
    probe.fit(scaler.transform(train_x), train_y)
    correct, step = 0, max(1, int(block))
    for start in range(0, rows.size, step):
        chunk = np.asarray(test_x[rows[start:start + step]], dtype=np.float64)    # (b, D)
        correct += int((probe.predict(scaler.transform(chunk)) == test_y[start:start + step]).sum())
    return correct / rows.size


def confusion_matrix(true: Sequence[int], predicted: Sequence[int], classes: int) -> np.ndarray:
    """(C, C) counts: row = true class, column = predicted class (scikit-learn's layout)."""
    true, predicted = np.asarray(true, dtype=np.int64), np.asarray(predicted, dtype=np.int64)
    if true.shape != predicted.shape or true.ndim != 1:
        raise ValueError(f"give one prediction per true class, got {true.shape} and {predicted.shape}")
    if true.size and (min(true.min(), predicted.min()) < 0 or max(true.max(), predicted.max()) >= classes):
        raise ValueError(f"class indices must lie in 0..{classes - 1}")
    return np.bincount(true * classes + predicted, minlength=classes * classes).reshape(classes, classes)


def per_class_recall(confusion: np.ndarray) -> np.ndarray:
    """Share of each true class predicted as itself; NaN for a class with no rows. (C,)"""
    support = confusion.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(support > 0, np.diag(confusion) / support, np.nan)
