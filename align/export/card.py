"""What an export says about itself: the image side's contract and the card.

    image_side.json  the image side the text side was trained against: the frozen tower's source,
                     fingerprint (name, weights sha256, preprocessing, pooling, norm) and how to rebuild
                     its embedding without align; for stored vectors, their content hash and model id
    card.json        recipe, data manifest hash, metrics, embedding size, temperature, intended use,
                     limits, caution, the export checks' results
    CARD.md          the same, for people
"""
from __future__ import annotations

import json
from datetime import datetime, timezone
from pathlib import Path

from .. import __version__
from .. import artifacts as A
from ..recipe import dump_recipe
from ..text import TextKind, TextTower
from ..vision import TOWER_IDENTITY, FrozenImageTower
from .writers import FORMAT_VERSION

CAUTION = ("Retrieval and zero-shot results are ranked guesses from a model, not findings. Over medical, legal "
           "or other consequential material they are an aid for a qualified person, who makes every decision; "
           "never act on a match alone.")
INTENDED_USE = ("Text-to-image search and zero-shot labelling over images embedded by exactly the frozen image "
                "tower in image_side.json, in the domain and vocabulary of the training captions. Stored image "
                "embeddings from that tower stay valid: only the text side was trained.")
LIMITS = (
    "Only meaningful against image embeddings from the tower, weights and preprocessing in image_side.json; "
    "any other tower's embeddings live in another space.",
    "The text side knows the words and concepts of its training captions; phrasing, terms or subjects far "
    "from them rank less reliably.",
    "The text side cannot find what the frozen image tower does not encode, and inherits its blind spots and "
    "biases.",
    "Captions longer than max_length tokens are truncated.",
    "The metrics above come from the run's own validation data; measure on your own held-out data before "
    "relying on it.",
)


def image_side_record(tower: FrozenImageTower | None, trained_against: dict) -> dict:
    """Everything needed to make image embeddings that match the text side, without align.

    ``trained_against`` is the image-side fingerprint the run recorded: the tower's, with
    ``stored_vectors`` when the training targets were stored vectors. Without a tower (vectors
    only), the record names the model id the team declared and what a new image must go through.
    """
    stored = trained_against.get("stored_vectors")
    if tower is None:
        record = {key: trained_against.get(key) for key in TOWER_IDENTITY}
        return {**record, "format_version": FORMAT_VERSION, "stored_vectors": stored,
                "recipe": {"source": "stored"},
                "how_to_match": f"embed a new image exactly as the stored vectors were made: with the model the "
                                f"team declared as {record['model']!r}, its own preprocessing and pooling, then "
                                "divide by the L2 norm; align holds no tower for it, so align.load embeds text only"}
    record = {**tower.fingerprint, "format_version": FORMAT_VERSION, **tower.rebuild_record(),
              "preprocessing_steps": repr(tower.transform),
              "channels_last": tower.channels_last,  # memory format only; changes nothing but float rounding
              "recipe": tower.recipe_keys(),
              "how_to_match": "preprocess a new image by preprocessing_rule, run the model as build says and pool "
                              "by embedding_rule; align.load(EXPORT) does exactly this and refuses any other tower"}
    if stored:
        record["stored_vectors"] = stored
    return record


def _data_record(shards: str) -> dict:
    from ..data.shards import read_manifest

    try:
        manifest = read_manifest(shards)
    except AlignError as exc:
        return {"shards": shards, "available": False, "note": exc.message}
    return {"shards": shards, "available": True, "manifest_content_hash": manifest["content_hash"],
            "splits": {name: {"samples": s["samples"], "content_hash": s["content_hash"]}
                       for name, s in manifest["splits"].items()},
            "label_fields": manifest.get("label_fields", []), "counts": manifest.get("counts", {})}


def _fmt(value) -> str:
    return f"{value:.4g}" if isinstance(value, float) else str(value)


def render_card(card: dict) -> str:
    text = card["text_tower"]
    lines = [f"# {card['name']}: text tower for retrieval", "",
             f"> **Caution.** {card['caution']}", "",
             "## Intended use", "", card["intended_use"], "",
             "## Model", "",
             f"- text tower: `{text['kind']}` on `{text['base_model']}`" + (
                 f" (LoRA r={text['lora']['rank']}, alpha={text['lora']['alpha']}, on {', '.join(text['lora']['targets'])})"
                 if text.get("lora") else ""),
             f"- embedding size: {card['embedding_dim']}; captions truncated at {text['max_length']} tokens",
             f"- temperature: {card['temperature']:.4f} ({card['loss']['kind']} loss)",
             _image_side_line(card["image_tower"]),
             f"- trained: {card['checkpoint']} ({card['step']} steps) of run `{card['run_dir']}`", "",
             "## Data", ""]
    data = card["data"]
    if data.get("available"):
        lines.append(f"- packed folder `{data['shards']}`, manifest content hash `{data['manifest_content_hash']}`")
        lines += [f"- {name}: {s['samples']} samples, content hash `{s['content_hash']}`"
                  for name, s in data["splits"].items()]
    else:
        lines.append(f"- `{data['shards']}` (not readable at export: {data.get('note', '')})")
    lines += ["", "## Metrics", ""]
    if card["metrics"]:
        lines += ["| metric | value |", "| --- | --- |"]
        lines += [f"| {k} | {_fmt(v)} |" for k, v in sorted(card["metrics"].items())]
    else:
        lines.append("No metrics.json in the run: run `align evaluate RUN_DIR` and export again.")
    lines += ["", "## Limits", ""] + [f"- {limit}" for limit in card["limits"]]
    lines += ["", "## Recipe", "", "```toml", card["recipe_toml"].rstrip(), "```"]
    lines += ["", "## Export checks", ""] + [f"- {k}: {_fmt(v)}" for k, v in sorted(card["export_checks"].items())]
    return "\n".join(lines) + "\n"


def _image_side_line(side: dict) -> str:
    stored = side.get("stored_vectors")
    vectors = (f"stored vectors of `{stored['model']}` ({stored['rows']} rows, content sha256 "
               f"`{stored['content_sha256'][:12]}…`)" if stored else "")
    if side.get("source") == "stored":
        return f"- image side: {vectors}; no tower (align embeds text only)"
    tower = (f"- image tower (frozen, {side.get('source', 'timm')}): `{side['model']}`, weights sha256 "
             f"`{side['weights_sha256']}`, input {side['preprocessing']['input_size']}")
    return tower + (f"; trained against {vectors}" if vectors else "")


def build_card(recipe, run_dir: Path, ckpt: Path, step: int | None, tower: TextTower, kind: TextKind, loss_fn,
               image_side: dict, checks: dict) -> dict:
    """``image_side``: the fingerprint the run was trained against (see ``image_side_record``)."""
    metrics_path = run_dir / A.METRICS
    metrics = json.loads(metrics_path.read_text(encoding="utf-8")) if metrics_path.is_file() else None
    text = {"kind": tower.kind, "max_length": tower.max_length, "vocab_size": len(tower.tokenizer),
            **kind.card(recipe.text)}
    keep = ("source", "model", "weights_sha256", "preprocessing", "feature_dim", "stored_vectors")
    return {"name": recipe.name, "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
            "align_version": __version__, "run_dir": str(run_dir.resolve()), "checkpoint": ckpt.name,
            "step": step, "text_tower": text, "embedding_dim": image_side["feature_dim"],
            "temperature": float(loss_fn.temperature()), "loss": {"kind": recipe.loss.kind, **loss_fn.metrics()},
            "image_tower": {k: image_side.get(k) for k in keep},
            "data": _data_record(recipe.data.shards), "metrics": metrics, "recipe": recipe.to_dict(),
            "recipe_toml": dump_recipe(recipe),
            "intended_use": INTENDED_USE, "limits": list(LIMITS), "caution": CAUTION, "export_checks": checks}
