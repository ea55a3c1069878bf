"""Domain vocabulary: the report, mining, extension, new-row init, and training only the new rows.

References outside the project: the tokenizer's public ``tokenize`` / ``__call__`` as plain
transformers exposes them, a fresh ``AutoModel`` load of the base encoder, ``collections.Counter``
and numpy for the counts, and scikit-learn's bundled digits for the images.
"""
from __future__ import annotations

import json
import re
from collections import Counter

import numpy as np
import pytest
import torch
from PIL import Image

from align import artifacts as A
from align.checkpoint import latest_checkpoint, load_weights
from align.errors import AlignError
from align.recipe import ScratchConfig, TextConfig
from align.text import build_text_tower, default_text_model_dir
from recipes import tiny_recipe

# Trade words the MiniLM (BERT uncased WordPiece) tokenizer splits into 3+ pieces, e.g.
# zellige -> ze ##lli ##ge; one per digit class so they carry the label.
TERMS = ["zellige", "quatrefoil", "craquelure", "celadon", "terracotta", "basketweave", "encaustic",
         "bullnose", "hexagonal", "pinstripe"]
DIGIT_WORDS = ["zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine"]
TEMPLATES = ["a {t} tile with a handwritten {d}", "{t} glaze, the digit {d}", "handmade {t}: {d}"]


@pytest.fixture(scope="module")
def base():
    """The base tokenizer and encoder, loaded with plain transformers (the independent reference)."""
    from transformers import AutoModel, AutoTokenizer

    path = str(default_text_model_dir())
    return AutoTokenizer.from_pretrained(path), AutoModel.from_pretrained(path)


def _independent_split(tokenizer, word: str) -> list[str]:
    return tokenizer.tokenize(word)


@pytest.fixture(scope="module")
def tile_word_shards(tmp_path_factory):
    """240 scikit-learn digits at 32 px whose captions carry a fragmented trade word per class."""
    from sklearn.datasets import load_digits

    from align.data.pack import pack_source

    root = tmp_path_factory.mktemp("tile-words")
    src = root / "src"
    src.mkdir()
    digits = load_digits()
    for i in range(240):
        pixels = (digits.images[i] * (255.0 / 16.0)).astype(np.uint8)
        Image.fromarray(255 - pixels).resize((32, 32), Image.BILINEAR).convert("RGB").save(src / f"d{i:04d}.png")
        label = int(digits.target[i])
        caption = TEMPLATES[i % len(TEMPLATES)].format(t=TERMS[label], d=DIGIT_WORDS[label])
        (src / f"d{i:04d}.txt").write_text(caption)
        (src / f"d{i:04d}.json").write_text(json.dumps({"digit": DIGIT_WORDS[label]}))
    pack_source(src, root / "shards", val_fraction=0.2)
    return root / "shards"


CAPTIONS = ["Cobalt zellige wall tile, quatrefoil border", "zellige in ochre, craquelure finish",
            "quatrefoil tile, terracotta zellige", "a plain white tile", "basketweave tile, 300 x 300 mm"]


def test_report_counts_match_an_independent_count(base):
    from align.text.vocab import tokenizer_stats, vocab_report

    tokenizer, _ = base
    stats = tokenizer_stats(tokenizer, CAPTIONS, "base")
    # independent: lower-case, words of letters by regex, each word through the public tokenize()
    counts, holders, words, split = Counter(), 0, 0, 0
    for caption in CAPTIONS:
        found = [w for w in re.findall(r"[^\W\d_]+", caption.lower())]
        words += len(found)
        frag = [w for w in found if len(_independent_split(tokenizer, w)) >= 3]
        split += len(frag)
        counts.update(frag)
        holders += bool(frag)
    expected = sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))
    assert [(t.term, t.count) for t in stats.fragmented_terms] == expected
    assert stats.fragmented_terms[0].term == "zellige" and stats.fragmented_terms[0].count == 3
    assert stats.captions_with_split_term == pytest.approx(holders / len(CAPTIONS))
    assert stats.split_rate == pytest.approx(split / words)
    # from memory: a BERT tokenizer wraps one sequence as [CLS] ... [SEP], two tokens more than tokenize()
    lengths = np.array([len(tokenizer.tokenize(c)) + 2 for c in CAPTIONS])
    assert stats.tokens_per_caption_mean == pytest.approx(lengths.mean())
    assert stats.tokens_per_caption_p95 == pytest.approx(np.percentile(lengths, 95))

    report = vocab_report(CAPTIONS, tokenizer, cap=2, scratch_vocab_size=500)
    assert report["mined_terms"] == ["zellige", "quatrefoil"]  # the cap keeps the two most frequent (3 and 2)
    ext = report["tokenizers"]["extended"]
    # each added term replaces its pieces by one token: 2 fewer for zellige (3 pieces), 3 for quatrefoil (4)
    saved = sum(c.lower().count("zellige") * 2 + c.lower().count("quatrefoil") * 3 for c in CAPTIONS)
    assert ext["tokens_per_caption_mean"] == pytest.approx(lengths.mean() - saved / len(CAPTIONS))
    # the WordPiece trainer merges until the vocabulary is full or no pair is left (tokenizers docs):
    # with room for 500 tokens every word of five captions ends up whole
    assert report["tokenizers"]["scratch"]["split_any_rate"] == 0.0 < report["tokenizers"]["base"]["split_any_rate"]
    assert "zellige" in report["headline"]


def test_new_rows_start_as_the_mean_of_their_pieces(base, tmp_path):
    tokenizer, model = base
    terms = ["zellige", "Quatrefoil", "fish scale", "tile"]  # "tile" is one token already: not added
    cfg = TextConfig(kind="lora", new_tokens=terms, max_length=16)
    tower = build_text_tower(cfg, 16, train_captions=CAPTIONS, tokenizer_dir=tmp_path / A.TOKENIZER_DIR)
    vocab = len(tokenizer)
    record = json.loads((tmp_path / A.TOKENIZER_DIR / A.NEW_TOKENS).read_text())
    assert record["terms"] == ["zellige", "quatrefoil", "fish scale"]
    assert record["token_ids"] == [vocab, vocab + 1, vocab + 2]
    assert tower.tokenizer.tokenize("Zellige and zelliges, fish scale") == [
        "zellige", "and", "ze", "##lli", "##ges", ",", "fish scale"]  # whole words only

    embedding = tower.encoder.get_input_embeddings()  # peft's trainable-token wrapper
    with torch.no_grad():
        rows = embedding(torch.arange(vocab + 3)[None])[0]  # (V + 3, H): what the encoder reads
    reference = model.get_input_embeddings().weight.detach()  # (V, H) from a separate plain load
    assert torch.equal(rows[:vocab], reference)
    for i, term in enumerate(["zellige", "quatrefoil", "fish scale"]):
        ids = tokenizer.convert_tokens_to_ids(tokenizer.tokenize(term))
        assert len(ids) >= 2
        expected = reference[ids].double().mean(0).float()  # the mean of the pieces' rows
        torch.testing.assert_close(rows[vocab + i], expected, rtol=0, atol=1e-7)


def test_scratch_tower_keeps_its_added_terms(tmp_path):
    cfg = TextConfig(kind="scratch", new_tokens=["fish scale"], max_length=16,
                     scratch=ScratchConfig(width=32, layers=1, attention_heads=2, vocabulary_size=300))
    trained = build_text_tower(cfg, 8, train_captions=CAPTIONS + ["fish scale mosaic"],
                               tokenizer_dir=tmp_path / A.TOKENIZER_DIR)
    reloaded = build_text_tower(cfg, 8, tokenizer_dir=tmp_path / A.TOKENIZER_DIR)
    assert "fish scale" in trained.tokenizer.tokenize("a fish scale tile")
    assert len(reloaded.tokenizer) == len(trained.tokenizer)
    assert reloaded.tokenize(["a fish scale tile"])["input_ids"].tolist() == \
        trained.tokenize(["a fish scale tile"])["input_ids"].tolist()


def test_auto_needs_captions_or_the_runs_vocabulary(tmp_path):
    with pytest.raises(AlignError, match="mines the training captions"):
        build_text_tower(TextConfig(new_tokens="auto"), 8, tokenizer_dir=tmp_path / "none")


@pytest.fixture(scope="module")
def extended_run(tile_word_shards, tmp_path_factory):
    from align.training.loop import train

    recipe = tiny_recipe(tile_word_shards, "lora", name="vocab", text__max_length=16, text__new_tokens="auto",
                         train__steps=8, train__lr=5e-3, train__log_every=4, train__threads=0)
    run_dir = tmp_path_factory.mktemp("vocab-run") / "run"
    train(recipe, run_dir)
    return recipe, run_dir


def test_training_changes_only_the_new_rows(extended_run, base):
    from align.run import RunDir

    tokenizer, model = base
    recipe, run_dir = extended_run
    record = json.loads((run_dir / A.TOKENIZER_DIR / A.NEW_TOKENS).read_text())
    assert sorted(record["terms"]) == sorted(TERMS)  # every class word is fragmented and frequent
    n, vocab = len(TERMS), len(tokenizer)

    # the checkpoint holds the new rows only, not the (V + n, H) matrix
    weights = load_weights(latest_checkpoint(run_dir))
    token_tensors = {k: v for k, v in weights.items() if "trainable_tokens" in k}
    assert [tuple(v.shape) for v in token_tensors.values()] == [(n, model.config.hidden_size)]
    assert not any("word_embeddings.weight" in k for k in weights)

    tower = RunDir(run_dir).load_trained(weights["text.projection.weight"].shape[0], recipe=recipe).tower
    with torch.no_grad():
        rows = tower.encoder.get_input_embeddings()(torch.arange(vocab + n)[None])[0]  # (V + n, H)
    reference = model.get_input_embeddings().weight.detach()
    assert torch.equal(rows[:vocab], reference)  # every pre-existing row bit-identical
    for i, term in enumerate(record["terms"]):
        start = reference[tokenizer.convert_tokens_to_ids(tokenizer.tokenize(term))].mean(0)
        assert float((rows[vocab + i] - start).abs().max()) > 1e-4, term  # each new row learned
    assert tower.tokenizer.tokenize("a zellige tile") == ["a", "zellige", "tile"]


def test_vocab_command_json(tile_word_shards, tmp_path, capsys):
    from align.cli import main

    assert main(["vocab", str(tile_word_shards), "--json", "--top", "5"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert sorted(report["mined_terms"]) == sorted(TERMS)
    base_stats = report["tokenizers"]["base"]
    assert len(base_stats["fragmented_terms"]) == 5 and base_stats["fragmented_terms_total"] == len(TERMS)
    assert base_stats["captions_with_split_term"] == 1.0  # every caption holds its class word
    assert report["tokenizers"]["extended"]["captions_with_split_term"] == 0.0
    assert main(["vocab", str(tmp_path)]) == 2  # not a packed folder: message and hint, no traceback


def test_export_reloads_with_plain_transformers(extended_run, extended_export, base):
    """Merged export, reloaded without align: new terms are single tokens, embeddings match training."""
    import torch.nn.functional as F
    from safetensors.torch import load_file
    from transformers import AutoModel, AutoTokenizer

    from align.run import RunDir

    tokenizer, model = base
    recipe, run_dir = extended_run
    out = extended_export
    weights = load_weights(latest_checkpoint(run_dir))
    trained = RunDir(run_dir).load_trained(weights["text.projection.weight"].shape[0], recipe=recipe).tower

    folder = out / A.EXPORT_TEXT_ENCODER
    plain_tok = AutoTokenizer.from_pretrained(str(folder))
    plain = AutoModel.from_pretrained(str(folder)).eval()
    projection = load_file(str(folder / A.PROJECTION))["weight"]  # (D, H)
    vocab = len(tokenizer)
    for i, term in enumerate(TERMS):
        ids = plain_tok(f"a {term} tile", add_special_tokens=False)["input_ids"]
        assert len(ids) == 3 and ids[1] >= vocab, (term, ids)  # one new token for the term

    # the merged matrix: old rows bit-identical to the base model, new rows the trained ones
    with torch.no_grad():
        trained_rows = trained.encoder.get_input_embeddings()(torch.arange(vocab + len(TERMS))[None])[0]
    merged_rows = plain.get_input_embeddings().weight.detach()
    assert merged_rows.shape == trained_rows.shape
    assert torch.equal(merged_rows[:vocab], model.get_input_embeddings().weight.detach())
    torch.testing.assert_close(merged_rows[vocab:], trained_rows[vocab:], rtol=0, atol=0)

    captions = [TEMPLATES[i % 3].format(t=TERMS[i], d=DIGIT_WORDS[i]) for i in range(len(TERMS))] + ["a tile"]
    batch = plain_tok(captions, padding=True, truncation=True, max_length=recipe.text.max_length, return_tensors="pt")
    with torch.no_grad():
        hidden = plain(**batch).last_hidden_state  # (B, T, H)
    mask = batch["attention_mask"].unsqueeze(-1).float()
    plain_emb = F.normalize(((hidden * mask).sum(1) / mask.sum(1)) @ projection.T, dim=-1)  # (B, D)
    # the export's own contract allows 1e-4 between forms (LoRA folded into the weights reorders sums)
    torch.testing.assert_close(plain_emb, trained.embed(captions), rtol=0, atol=1e-4)


@pytest.fixture(scope="module")
def extended_export(extended_run, tmp_path_factory):
    from align.export import export_run

    out = tmp_path_factory.mktemp("vocab-export") / "export"
    export_run(extended_run[1], out, onnx=False)
    return out


def test_adapter_export_stores_only_the_new_rows(extended_export, base, extended_run):
    """The adapter holds the (n, H) new rows, not the resized matrix, and still rebuilds the tower."""
    from safetensors.torch import load_file

    from align.api import load_adapter_encoder
    from align.run import RunDir

    _, model = base
    adapter = load_file(str(extended_export / A.EXPORT_ADAPTER / "adapter_model.safetensors"))
    shapes = {k: tuple(v.shape) for k, v in adapter.items() if "embed" in k or "token" in k}
    assert list(shapes.values()) == [(len(TERMS), model.config.hidden_size)], shapes

    recipe, run_dir = extended_run
    weights = load_weights(latest_checkpoint(run_dir))
    trained = RunDir(run_dir).load_trained(weights["text.projection.weight"].shape[0], recipe=recipe).tower
    rebuilt, tokenizer, _ = load_adapter_encoder(extended_export / A.EXPORT_ADAPTER)
    captions = ["a zellige tile with a handwritten two", "celadon glaze, the digit three", "a tile"]
    batch = tokenizer(captions, padding=True, truncation=True, return_tensors="pt")
    with torch.no_grad():
        torch.testing.assert_close(rebuilt(batch["input_ids"], batch["attention_mask"]),
                                   trained(batch["input_ids"], batch["attention_mask"]), rtol=0, atol=1e-5)
