"""The report's plots, drawn with matplotlib's Agg backend (no display) and returned as PNG bytes.

Each function takes plain records (the training log's dicts, the evaluation details) and returns
the PNG, or None when there is nothing to draw, so the page and the PNG files show the same picture.
"""
from __future__ import annotations

import io

import matplotlib

matplotlib.use("Agg")  # before pyplot: a headless machine has no display, and a report needs none

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

DPI = 110
T2I, I2T, PROBE, ZERO_SHOT = "#d9534f", "#3a7bd5", "#8a8f98", "#2f9e6f"
# a few distinct colours for runs side by side and for several recall curves
PALETTE = ["#3a7bd5", "#d9534f", "#2f9e6f", "#e39b2d", "#7b5bc4", "#2aa3b3", "#b45a8e", "#6b7383"]


def _png(fig) -> bytes:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=DPI, bbox_inches="tight")
    plt.close(fig)
    return buffer.getvalue()


def _recall_axis(ax, lowest: float) -> None:
    """A recall axis from just under the lowest value drawn to 1: recalls near 1 still show apart."""
    ax.set_ylim(max(0.0, np.floor((lowest - 0.02) * 20) / 20), 1.005)


def _series(records: list[dict], key: str) -> tuple[list[int], list[float]]:
    points = [(r["step"], r[key]) for r in records if isinstance(r.get(key), (int, float))]
    return [p[0] for p in points], [p[1] for p in points]


def training_curves(records: list[dict]) -> bytes | None:
    """Loss, temperature and learning rate against step, side by side."""
    if not any("loss" in r for r in records):
        return None
    fig, axes = plt.subplots(1, 3, figsize=(12, 3.2))
    for ax, key, title, colour in zip(axes, ("loss", "temperature", "lr"),
                                      ("training loss", "temperature", "learning rate"), PALETTE):
        steps, values = _series(records, key)
        ax.plot(steps, values, color=colour, linewidth=1.6)
        ax.set_title(title)
        ax.set_xlabel("step")
        ax.grid(alpha=0.3)
    axes[2].ticklabel_format(axis="y", style="sci", scilimits=(-3, 3))
    fig.tight_layout()
    return _png(fig)


def validation_keys(records: list[dict]) -> list[str]:
    """The val/... keys logged, recalls first in their logged order, the mean last."""
    seen: list[str] = []
    for record in records:
        seen += [k for k in record if k.startswith("val/") and k not in seen]
    return sorted(seen, key=lambda k: k == "val/mean_recall")


def validation_curves(records: list[dict], best: tuple[int, float] | None = None,
                      best_key: str | None = None) -> bytes | None:
    """Validation recall against step, one line per logged key; the best step marked."""
    keys = validation_keys(records)
    if not keys:
        return None
    fig, ax = plt.subplots(figsize=(8, 3.6))
    for key, colour in zip(keys, PALETTE * 2):
        steps, values = _series(records, key)
        style = dict(linewidth=2.4, color="#1d2330") if key == "val/mean_recall" else dict(linewidth=1.4, color=colour)
        ax.plot(steps, values, marker="o", markersize=3, label=key[4:], **style)
    if best is not None:
        ax.axvline(best[0], color="#1d2330", linestyle="--", linewidth=1)
        ax.annotate(f"best {best_key[4:] if best_key else ''}: step {best[0]}", (best[0], best[1]),
                    textcoords="offset points", xytext=(6, -14), fontsize=8)
    _recall_axis(ax, min(v for key in keys for v in _series(records, key)[1]))
    ax.set_xlabel("step")
    ax.set_ylabel("recall (validation subset)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, ncol=4, loc="upper center", bbox_to_anchor=(0.5, -0.18), frameon=False)
    fig.tight_layout()
    return _png(fig)


def recall_intervals(recall: dict[str, dict], level: float) -> bytes | None:
    """Recall@K both ways as points with their bootstrap intervals."""
    if not recall:
        return None
    fig, ax = plt.subplots(figsize=(5.2, 3.0))
    lowest = 1.0
    for offset, (direction, colour, name) in zip((-0.12, 0.12), (("text_to_image", T2I, "text → image"),
                                                                  ("image_to_text", I2T, "image → text"))):
        rows = sorted((int(k.split("@")[1]), v) for k, v in recall.items() if k.startswith(direction))
        if not rows:
            continue
        x = np.arange(len(rows)) + offset
        values = np.array([v["value"] for _, v in rows])
        lowest = min(lowest, *(v["low"] for _, v in rows))
        errors = np.array([[v["value"] - v["low"] for _, v in rows], [v["high"] - v["value"] for _, v in rows]])
        ax.errorbar(x, values, yerr=np.clip(errors, 0, None), fmt="o", color=colour, capsize=4, label=name)
        ax.set_xticks(np.arange(len(rows)), [f"R@{k}" for k, _ in rows])
    _recall_axis(ax, lowest)
    ax.set_ylabel(f"recall ({level:.0%} interval)")
    ax.grid(alpha=0.3, axis="y")
    ax.legend(fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.12), ncol=2, frameon=False)
    fig.tight_layout()
    return _png(fig)


def field_accuracy(fields: dict[str, dict]) -> bytes | None:
    """Zero-shot accuracy beside the linear-probe ceiling, per label field."""
    if not fields:
        return None
    names = list(fields)
    x = np.arange(len(names))
    fig, ax = plt.subplots(figsize=(max(3.2, 1.4 * len(names) + 1.4), 2.8))
    ax.bar(x - 0.18, [fields[n]["zero_shot"] for n in names], 0.36, color=ZERO_SHOT, label="zero-shot")
    ax.bar(x + 0.18, [fields[n]["linear_probe"] or 0 for n in names], 0.36, color=PROBE, label="linear probe (ceiling)")
    ax.set_xticks(x, names)
    ax.set_ylim(0, 1.02)
    ax.set_ylabel("accuracy")
    ax.grid(alpha=0.3, axis="y")
    ax.legend(fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.12), ncol=2, frameon=False)
    fig.tight_layout()
    return _png(fig)


def confusion(field: str, detail: dict, max_classes: int = 40) -> bytes | None:
    """The zero-shot confusion matrix of one field, each row scaled to its class's count."""
    classes, counts = detail["classes"], np.asarray(detail["confusion"], dtype=float)
    if len(classes) > max_classes:  # unreadable as a picture; the per-class table still lists them
        return None
    shares = counts / np.maximum(counts.sum(axis=1, keepdims=True), 1)
    side = max(3.5, 0.38 * len(classes) + 1.8)
    fig, ax = plt.subplots(figsize=(side + 0.8, side))
    image = ax.imshow(shares, cmap="Blues", vmin=0, vmax=1)
    ax.set_xticks(range(len(classes)), classes, rotation=60, ha="right", fontsize=8)
    ax.set_yticks(range(len(classes)), classes, fontsize=8)
    ax.set_xlabel("predicted (zero-shot)")
    ax.set_ylabel("true")
    ax.set_title(field)
    if len(classes) <= 15:
        for (i, j), n in np.ndenumerate(counts):
            if n:
                ax.text(j, i, int(n), ha="center", va="center", fontsize=7,
                        color="white" if shares[i, j] > 0.5 else "#1d2330")
    fig.colorbar(image, ax=ax, fraction=0.046, pad=0.04, label="share of the true class")
    fig.tight_layout()
    return _png(fig)


def runs_validation(runs: dict[str, list[dict]], key: str) -> bytes | None:
    """One validation curve per run (``key`` of each run's log), for ``align compare``."""
    drawn = {name: _series(records, key) for name, records in runs.items()}
    if not any(steps for steps, _ in drawn.values()):
        return None
    fig, ax = plt.subplots(figsize=(8, 3.8))
    for (name, (steps, values)), colour in zip(drawn.items(), PALETTE * 4):
        if steps:
            ax.plot(steps, values, marker="o", markersize=3, color=colour, label=name)
    ax.set_ylim(0, 1.02)
    ax.set_xlabel("step")
    ax.set_ylabel(key)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    return _png(fig)
