"""align export: every form of the text side gives the same embedding, checked with outside loaders.

References outside align: transformers' own AutoModel/AutoTokenizer and peft's PeftModel load the
exported folders; onnxruntime runs the ONNX graph; the LoRA merge is checked against the update rule
W + (alpha/r)·B·A of Hu et al. 2021 (LoRA, eq. 3 and §4.1 scaling) computed by hand from the adapter
tensors; the image side is rebuilt from image_side.json with timm alone and scikit-image's sample
photos. The pooling in these tests is written out by hand, not imported from align.

The LoRA tests read conftest's session run ``tiny_lora_run`` (rank 4, alpha 8, 64 px images,
captions cut at 16 tokens), trained, evaluated and exported once for every module that needs one.
"""
from __future__ import annotations

import hashlib
import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import torch

from align import artifacts as A
from align.cli import main as cli_main
from align.errors import AlignError, FingerprintMismatch
from align.training import train
from recipes import tiny_recipe

# several lengths, so every batch is padded, and one caption past max_length (truncated)
CAPTIONS = ["seven", "a handwritten seven", "the digit four written by hand on a scanned form",
            "one", " ".join(["a caption much longer than the sixteen token limit of this tower"] * 3)]


def _hand_pool(hidden: torch.Tensor, mask: torch.Tensor, weight: torch.Tensor) -> np.ndarray:
    """Mean over real tokens, project, L2-normalise: written here from head.json's rules."""
    m = mask.unsqueeze(-1).float()
    pooled = (hidden * m).sum(1) / m.sum(1).clamp(min=1)
    out = pooled @ weight.T
    return (out / out.norm(dim=-1, keepdim=True)).numpy()


def _plain_transformers(folder, texts):
    from safetensors.torch import load_file
    from transformers import AutoModel, AutoTokenizer

    tokenizer = AutoTokenizer.from_pretrained(str(folder))
    encoder = AutoModel.from_pretrained(str(folder)).eval()
    weight = load_file(str(folder / "projection.safetensors"))["weight"]
    batch = tokenizer(texts, padding=True, truncation=True, return_tensors="pt")
    with torch.no_grad():
        hidden = encoder(input_ids=batch["input_ids"], attention_mask=batch["attention_mask"]).last_hidden_state
    return _hand_pool(hidden, batch["attention_mask"], weight), batch


def _onnxruntime(path, batch):
    import onnxruntime as ort

    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    return session.run(None, {"input_ids": batch["input_ids"].numpy(),
                              "attention_mask": batch["attention_mask"].numpy()})[0]


def _align_reference(run_dir, texts):
    from align.run import RunDir

    tower = RunDir(run_dir).load_trained(1280).tower
    return tower.embed(texts).numpy()


def test_adapter_merged_and_onnx_agree(tiny_lora_run):
    from peft import PeftModel
    from safetensors.torch import load_file
    from transformers import AutoModel, AutoTokenizer

    run_dir, export = tiny_lora_run
    reference = _align_reference(run_dir, CAPTIONS)

    # merged encoder, plain transformers, pooling by hand
    merged, batch = _plain_transformers(export / A.EXPORT_TEXT_ENCODER, CAPTIONS)
    assert batch["input_ids"].shape[1] == 16  # the long caption was truncated at max_length

    # adapter on its base, through peft's own loader
    adapter_dir = export / A.EXPORT_ADAPTER
    base_dir = json.loads((adapter_dir / "adapter_config.json").read_text())["base_model_name_or_path"]
    tokenizer = AutoTokenizer.from_pretrained(str(adapter_dir))
    peft_model = PeftModel.from_pretrained(AutoModel.from_pretrained(base_dir), str(adapter_dir)).eval()
    adapter_batch = tokenizer(CAPTIONS, padding=True, truncation=True, return_tensors="pt")
    assert torch.equal(adapter_batch["input_ids"], batch["input_ids"])
    with torch.no_grad():
        hidden = peft_model(input_ids=adapter_batch["input_ids"],
                            attention_mask=adapter_batch["attention_mask"]).last_hidden_state
    adapter = _hand_pool(hidden, adapter_batch["attention_mask"],
                         load_file(str(adapter_dir / "projection.safetensors"))["weight"])

    onnx = _onnxruntime(export / A.EXPORT_ONNX, batch)
    for name, other in (("merged", merged), ("adapter+base", adapter), ("onnx", onnx)):
        diff = float(np.abs(other - reference).max())
        print(f"{name} vs align: max abs diff {diff:.2e}")
        assert other.shape == (len(CAPTIONS), 1280)
        assert diff <= 1e-4, (name, diff)  # the tolerance
    assert float(np.abs(merged - onnx).max()) <= 1e-4
    # the trained adapter must have moved the embedding, or agreement above would prove little
    base_only, _ = _plain_transformers_base(base_dir, adapter_dir, CAPTIONS)
    assert float(np.abs(base_only - reference).max()) > 1e-3

    info = json.loads((export / A.EXPORT_INFO).read_text())
    assert info["checks"]["onnx_max_abs_diff"] <= 1e-4
    assert len({tuple(s) for s in info["checks"]["onnx_checked_shapes"]}) >= 3  # several padded shapes


def _plain_transformers_base(base_dir, adapter_dir, texts):
    """The base encoder without the adapter, with the trained projection: the untrained text side."""
    from safetensors.torch import load_file
    from transformers import AutoModel, AutoTokenizer

    tokenizer = AutoTokenizer.from_pretrained(str(adapter_dir))
    encoder = AutoModel.from_pretrained(base_dir).eval()
    batch = tokenizer(texts, padding=True, truncation=True, return_tensors="pt")
    with torch.no_grad():
        hidden = encoder(**{k: batch[k] for k in ("input_ids", "attention_mask")}).last_hidden_state
    return _hand_pool(hidden, batch["attention_mask"], load_file(str(adapter_dir / "projection.safetensors"))["weight"]), batch


def test_merged_weight_is_w_plus_scaled_ba(tiny_lora_run):
    """Hu et al. 2021: the merged weight is W0 + (alpha / r) · B · A."""
    from safetensors.torch import load_file

    _, export = tiny_lora_run
    config = json.loads((export / A.EXPORT_ADAPTER / "adapter_config.json").read_text())
    adapter = load_file(str(export / A.EXPORT_ADAPTER / "adapter_model.safetensors"))
    base = load_file(str(Path(config["base_model_name_or_path"]) / "model.safetensors"))
    merged = load_file(str(export / A.EXPORT_TEXT_ENCODER / "model.safetensors"))
    scale = config["lora_alpha"] / config["r"]
    for layer, proj in ((0, "query"), (5, "value")):
        name = f"encoder.layer.{layer}.attention.self.{proj}"
        a = adapter[f"base_model.model.{name}.lora_A.weight"].double()  # (r, in)
        b = adapter[f"base_model.model.{name}.lora_B.weight"].double()  # (out, r)
        w0 = base[f"{name}.weight"].double()  # (out, in)
        update = scale * b @ a
        assert a.shape[0] == config["r"] == 4
        assert float(update.abs().max()) > 1e-6  # training moved B off its zero init
        expected = w0 + update
        assert float((merged[f"{name}.weight"].double() - expected).abs().max()) <= 1e-6
        assert not torch.allclose(merged[f"{name}.weight"].double(), w0, atol=1e-7, rtol=0)


def _timm_from_image_side(side: dict):
    """Rebuild the frozen tower from image_side.json with timm and torch only (no align code)."""
    import timm

    model = timm.create_model(side["model"], pretrained=False)
    state = torch.load(side["weights"]["path"], map_location="cpu", weights_only=True)
    target = model.state_dict()
    if set(state) != set(target):  # image_side.json: tensors line up one to one, in order and shape
        assert len(state) == len(target)
        state = {name: tensor for name, tensor in zip(target, state.values())}
        assert all(state[n].shape == target[n].shape for n in target)
    model.load_state_dict(state, strict=True)
    model.reset_classifier(0)
    return model.eval()


def test_image_side_json_alone_rebuilds_the_image_embedding(tiny_lora_run):
    import timm.data
    from skimage import data as samples
    from PIL import Image

    import align

    _, export = tiny_lora_run
    side = json.loads((export / A.IMAGE_SIDE).read_text())
    model = _timm_from_image_side(side)

    # the weight hash, by the rule image_side.json states
    digest = hashlib.sha256()
    for name, tensor in model.state_dict().items():
        t = tensor.detach().contiguous().reshape(-1)
        digest.update(f"{name}|{t.dtype}|{tuple(t.shape)}|".encode())
        digest.update(t.view(torch.uint8).numpy().tobytes())
    assert digest.hexdigest() == side["weights_sha256"]

    transform = timm.data.create_transform(**side["preprocessing"], is_training=False)
    photos = [Image.fromarray(samples.chelsea()), Image.fromarray(samples.coffee())]
    with torch.no_grad():
        pooled = model(torch.stack([transform(p.convert("RGB")) for p in photos]))  # (2, 1280)
    by_hand = (pooled / pooled.norm(dim=-1, keepdim=True)).numpy()

    loaded = align.load(export)
    ours = loaded.embed_images(photos)
    assert ours.shape == by_hand.shape == (2, side["feature_dim"])
    assert np.allclose(np.linalg.norm(by_hand, axis=1), 1.0, atol=1e-5)  # real features, not zeros
    # channels_last (recorded in image_side.json) only reorders float sums: rounding-level differences
    assert float(np.abs(ours - by_hand).max()) <= 1e-5
    assert np.allclose(loaded.scores(["a cat"], photos), loaded.embed_text(["a cat"]) @ ours.T, atol=1e-6)


def test_load_refuses_another_tower(tiny_lora_run, tmp_path):
    import timm
    from safetensors.torch import save_file

    import align

    _, export = tiny_lora_run
    torch.manual_seed(0)
    # same architecture and names (classifier included, as the file align loads by name), other weights
    other = timm.create_model("efficientnet_lite0", pretrained=False)
    path = tmp_path / "other.safetensors"
    save_file({k: v.contiguous() for k, v in other.state_dict().items()}, str(path))
    with pytest.raises(FingerprintMismatch, match="not the one this export was trained against"):
        align.load(export, weights=path)


def test_card_carries_recipe_data_hash_metrics_and_caution(tiny_lora_run):
    from align.data.shards import read_manifest

    run_dir, export = tiny_lora_run
    card = json.loads((export / A.CARD_JSON).read_text())
    metrics = json.loads((run_dir / A.METRICS).read_text())
    recipe_shards = card["recipe"]["data"]["shards"]
    assert card["data"]["manifest_content_hash"] == read_manifest(recipe_shards)["content_hash"]
    assert card["metrics"] == metrics
    assert card["embedding_dim"] == 1280
    assert card["temperature"] == pytest.approx(metrics["temperature"], rel=1e-6)
    assert card["recipe"]["text"]["lora_rank"] == 4
    text = (export / A.CARD_MD).read_text()
    assert "qualified person" in text and "medical" in text and "legal" in text
    assert card["data"]["manifest_content_hash"] in text and "text_to_image_recall@1" in text
    readme = (export / A.EXPORT_TEXT_ENCODER / A.TEXT_HEAD_README).read_text()
    assert "attention_mask" in readme and "projection.safetensors" in readme


def test_tolerance_is_enforced(tiny_lora_run):
    """A reference shifted by 2e-4 must fail the 1e-4 check the export runs on ONNX output."""
    from transformers import AutoTokenizer

    from align.export import TOLERANCE, enforce, max_abs_difference, onnx_runner

    _, export = tiny_lora_run
    tokenizer = AutoTokenizer.from_pretrained(str(export / A.EXPORT_TEXT_ENCODER))
    batches = [dict(tokenizer(CAPTIONS[:3], padding=True, truncation=True, return_tensors="pt"))]
    run = onnx_runner(export / A.EXPORT_ONNX)
    assert max_abs_difference(batches, run, run) == 0.0
    shifted = max_abs_difference(batches, lambda b: run(b) + 2 * TOLERANCE, run)
    with pytest.raises(AlignError, match="export check failed"):
        enforce("the ONNX model", shifted)


def test_reexport_replaces_and_foreign_folder_is_refused(tiny_lora_run, tmp_path, capsys):
    run_dir, export = tiny_lora_run
    again = tmp_path / "again"
    shutil.copytree(export, again)
    assert cli_main(["export", str(run_dir), "--out", str(again), "--no-onnx"]) == 0
    assert not (again / A.EXPORT_ONNX).exists()  # the old folder was replaced whole, not merged into
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("mine")
    assert cli_main(["export", str(run_dir), "--out", str(foreign)]) == 2
    assert "not an align export" in " ".join(capsys.readouterr().err.split())  # rich wraps long lines
    assert cli_main(["export", str(tmp_path / "nothing"), "--out", str(tmp_path / "x")]) == 2


def test_scratch_tower_exports_whole(small_digits_shards, tmp_path):
    train(tiny_recipe(small_digits_shards, "scratch", name="tiny-scratch", text__max_length=16,
                      train__steps=3, train__lr=5e-4, train__threads=0), tmp_path / "run")
    from align.export import export_run

    info = export_run(tmp_path / "run", tmp_path / "export")
    assert info["trained_weights"] == A.EXPORT_TEXT_ENCODER and not (tmp_path / "export" / A.EXPORT_ADAPTER).exists()
    reference = _align_reference(tmp_path / "run", CAPTIONS)
    merged, batch = _plain_transformers(tmp_path / "export" / A.EXPORT_TEXT_ENCODER, CAPTIONS)
    onnx = _onnxruntime(tmp_path / "export" / A.EXPORT_ONNX, batch)
    assert float(np.abs(merged - reference).max()) <= 1e-4
    assert float(np.abs(onnx - reference).max()) <= 1e-4
