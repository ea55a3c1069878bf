"""Domain vocabulary: the trade's words a tokenizer breaks apart, and how to teach them.

A pretrained tokenizer splits words it never saw ("zellige" -> ze ##lli ##ge) into fragments the
encoder never learned to join. This module

- measures that on a caption set (tokens per caption, the words split into ``MIN_PIECES`` or more
  pieces ranked by how often they occur, the share of captions holding one), for the base tokenizer,
  the base tokenizer extended with the mined terms, and a tokenizer learned on the captions;
- mines the terms to add (``text.new_tokens = "auto"``, at most ``text.new_tokens_cap``);
- extends a tokenizer with whole-word tokens and initialises each new embedding row as the mean of
  the rows of the pieces it replaced (so a new token starts where the encoder's own reading of the
  fragments is, not at noise);
- records the chosen terms beside the extended tokenizer, so a run reloads the same vocabulary.

A "word" is what the tokenizer's own normaliser and pre-tokeniser produce; its "pieces" are what the
tokenizer's model makes of that word in a caption.
"""
from __future__ import annotations

import json
import os
import shutil
import tempfile
from collections import Counter
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np
import torch

from . import artifacts as A
from .errors import AlignError

MIN_PIECES = 3  # a word in this many pieces or more counts as fragmented
MIN_COUNT = 2  # "auto" skips terms seen once: one caption is too little to learn a row from
RECORD_VERSION = 1


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


def is_term(word: str) -> bool:
    """Only words of letters are candidates: numbers and punctuation are not vocabulary."""
    return word.isalpha()


# ---------------------------------------------------------------------------------------------
# the report


@dataclass
class FragmentedTerm:
    term: str
    pieces: list[str]
    count: int  # occurrences over all captions
    captions: int  # captions holding it at least once


@dataclass
class TokenizerStats:
    name: str
    vocab_size: int
    tokens_per_caption_mean: float  # the encoder's sequence length, special tokens included
    tokens_per_caption_p95: float
    words: int  # word occurrences of letters only
    split_words: int  # of those, split into MIN_PIECES or more
    split_rate: float  # split_words / words
    split_any_rate: float  # share of word occurrences in 2+ pieces (any split at all)
    captions_with_split_term: float  # share of captions holding at least one fragmented word
    fragmented_terms: list[FragmentedTerm] = field(default_factory=list)


def _lengths(tokenizer, captions: Sequence[str]) -> np.ndarray:
    ids = tokenizer(list(captions), add_special_tokens=True, truncation=False)["input_ids"]
    return np.array([len(x) for x in ids], dtype=np.float64)


def tokenizer_stats(tokenizer, captions: Sequence[str], name: str, min_pieces: int = MIN_PIECES) -> TokenizerStats:
    """How ``tokenizer`` reads ``captions``: lengths, fragmented words ranked by occurrences."""
    if not captions:
        raise AlignError("no captions to analyse", "pack data with captions first (align pack)")
    lengths = _lengths(tokenizer, captions)
    pieces_cache: dict[str, list[str]] = {}
    occurrences: Counter = Counter()
    caption_hits: Counter = Counter()
    words = split_words = split_any = captions_with = 0
    for caption in captions:
        fragmented_here = set()
        for word in words_of(tokenizer, caption):
            if not is_term(word):
                continue
            words += 1
            if word not in pieces_cache:
                pieces_cache[word] = pieces_of(tokenizer, word)
            split_any += len(pieces_cache[word]) >= 2
            if len(pieces_cache[word]) >= min_pieces:
                split_words += 1
                occurrences[word] += 1
                fragmented_here.add(word)
        caption_hits.update(fragmented_here)
        captions_with += bool(fragmented_here)
    ranked = sorted(occurrences, key=lambda w: (-occurrences[w], w))
    return TokenizerStats(
        name=name, vocab_size=len(tokenizer), tokens_per_caption_mean=float(lengths.mean()),
        tokens_per_caption_p95=float(np.percentile(lengths, 95)), words=words, split_words=split_words,
        split_rate=split_words / max(words, 1), split_any_rate=split_any / max(words, 1),
        captions_with_split_term=captions_with / len(captions),
        fragmented_terms=[FragmentedTerm(w, pieces_cache[w], occurrences[w], caption_hits[w]) for w in ranked])


def mine_terms(tokenizer, captions: Sequence[str], cap: int, min_pieces: int = MIN_PIECES,
               min_count: int = MIN_COUNT) -> list[str]:
    """The ``cap`` most frequent words of letters that ``tokenizer`` splits into ``min_pieces``+ pieces."""
    if cap < 1:
        raise AlignError(f"text.new_tokens_cap must be at least 1 for new_tokens = \"auto\", got {cap}",
                         "set text.new_tokens_cap=64, or list the terms yourself")
    stats = tokenizer_stats(tokenizer, captions, "base", min_pieces)
    return [t.term for t in stats.fragmented_terms if t.count >= min_count][:cap]


def vocab_report(captions: Sequence[str], base_tokenizer, *, cap: int = 64, scratch_vocab_size: int = 2000,
                 top: int = 20, text_model: str = "") -> dict:
    """The base tokenizer beside itself extended with the mined terms and beside a caption-trained one."""
    from .text import train_scratch_tokenizer

    base = tokenizer_stats(base_tokenizer, captions, "base")
    mined = mine_terms(base_tokenizer, captions, cap)
    extended_tokenizer = copy_tokenizer(base_tokenizer)
    extend_tokenizer(extended_tokenizer, mined)
    extended = tokenizer_stats(extended_tokenizer, captions, f"base + {len(mined)} mined terms")
    scratch = tokenizer_stats(train_scratch_tokenizer(captions, scratch_vocab_size), captions,
                              f"captions' own WordPiece ({scratch_vocab_size})")
    report = {"captions": len(captions), "min_pieces": MIN_PIECES, "text_model": text_model,
              "mined_terms": mined, "new_tokens_cap": cap,
              "tokenizers": {"base": _stats_dict(base, top), "extended": _stats_dict(extended, top),
                             "scratch": _stats_dict(scratch, top)}}
    report["headline"] = headline(report)
    return report


def _stats_dict(stats: TokenizerStats, top: int) -> dict:
    data = asdict(stats)
    data["fragmented_terms_total"] = len(stats.fragmented_terms)
    data["fragmented_terms"] = data["fragmented_terms"][:top]
    return data


def headline(report: dict) -> str:
    base, ext, own = (report["tokenizers"][k] for k in ("base", "extended", "scratch"))
    top = ", ".join(t["term"] for t in base["fragmented_terms"][:4])
    return (f"{base['fragmented_terms_total']} caption terms split into {report['min_pieces']}+ pieces by the base "
            f"tokenizer ({top}{', …' if base['fragmented_terms_total'] > 4 else ''}) appear in "
            f"{base['captions_with_split_term']:.0%} of captions; tokens/caption {base['tokens_per_caption_mean']:.1f} "
            f"-> {ext['tokens_per_caption_mean']:.1f} with {len(report['mined_terms'])} terms added; "
            f"a tokenizer learned on the captions splits {own['split_any_rate']:.1%} of words at all "
            f"(base: {base['split_any_rate']:.1%})")


def report_tables(report: dict, top: int = 20):
    """Two rich tables: the tokenizers side by side, and the fragmented terms of the base tokenizer."""
    from rich.table import Table

    side = Table(title=f"vocabulary: {report['captions']} captions", show_header=True)
    side.add_column("measure")
    kinds = ("base", "extended", "scratch")
    for kind in kinds:
        side.add_column(report["tokenizers"][kind]["name"], justify="right")
    rows = [("vocabulary size", lambda s: f"{s['vocab_size']}"),
            ("tokens / caption (mean)", lambda s: f"{s['tokens_per_caption_mean']:.2f}"),
            ("tokens / caption (p95)", lambda s: f"{s['tokens_per_caption_p95']:.1f}"),
            (f"words split into {report['min_pieces']}+ pieces", lambda s: f"{s['split_rate']:.1%}"),
            ("words split at all (2+ pieces)", lambda s: f"{s['split_any_rate']:.1%}"),
            ("captions holding such a word", lambda s: f"{s['captions_with_split_term']:.1%}"),
            ("distinct fragmented words", lambda s: f"{s['fragmented_terms_total']}")]
    for label, fmt in rows:
        side.add_row(label, *(fmt(report["tokenizers"][k]) for k in kinds))

    terms = Table(title=f"terms the base tokenizer splits into {report['min_pieces']}+ pieces", show_header=True)
    for col, just in (("term", "left"), ("pieces", "left"), ("occurrences", "right"), ("captions", "right"),
                      ("added by auto", "center")):
        terms.add_column(col, justify=just)
    mined = set(report["mined_terms"])
    for t in report["tokenizers"]["base"]["fragmented_terms"][:top]:
        terms.add_row(t["term"], " ".join(t["pieces"]), str(t["count"]), str(t["captions"]),
                      "yes" if t["term"] in mined else "")
    return side, terms


# ---------------------------------------------------------------------------------------------
# extending a tokenizer and an embedding matrix


def copy_tokenizer(tokenizer):
    """An independent copy (adding tokens to it leaves the original alone)."""
    with tempfile.TemporaryDirectory() as tmp:
        tokenizer.save_pretrained(tmp)
        return type(tokenizer).from_pretrained(tmp)


def resolve_terms(tokenizer, terms: Sequence[str]) -> list[str]:
    """Normalised, de-duplicated terms the tokenizer does not already read as one token."""
    out: list[str] = []
    for raw in terms:
        term = normalize(tokenizer, raw).strip()
        if not term:
            raise AlignError(f"text.new_tokens holds an empty term ({raw!r})", "remove it from the list")
        if term in out or len(pieces_of(tokenizer, term)) < 2:
            continue  # already one token: nothing to teach
        out.append(term)
    return out


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


def mean_piece_rows(weight: torch.Tensor, base_tokenizer, terms: Sequence[str]) -> torch.Tensor:
    """(n, H): row i is the mean of ``weight``'s rows for the pieces base_tokenizer splits term i into."""
    rows = []
    for term in terms:
        ids = piece_ids(base_tokenizer, term)
        rows.append(weight[torch.tensor(ids)].mean(0))  # (H,)
    return torch.stack(rows) if rows else weight.new_zeros(0, weight.shape[1])


@torch.no_grad()
def extend_embeddings(encoder: torch.nn.Module, base_tokenizer, terms: Sequence[str], new_ids: Sequence[int]) -> None:
    """Grow the input embedding to hold ``new_ids``; each new row = mean of its pieces' rows.

    The old rows are copied, not recomputed, so they stay bit-identical.
    """
    old = encoder.get_input_embeddings().weight.detach().clone()  # (V, H)
    with torch.random.fork_rng():  # the resize's own random init must not shift the LoRA init after it
        encoder.resize_token_embeddings(old.shape[0] + len(terms), mean_resizing=False)
    weight = encoder.get_input_embeddings().weight  # (V + n, H)
    weight[torch.tensor(list(new_ids))] = mean_piece_rows(old, base_tokenizer, terms).to(weight.dtype)


# ---------------------------------------------------------------------------------------------
# the record beside the extended tokenizer


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
    old = tokenizer_dir.with_name(f".{tokenizer_dir.name}.old.{os.getpid()}")
    if tokenizer_dir.exists():
        os.replace(tokenizer_dir, old)
    os.replace(tmp, tokenizer_dir)
    shutil.rmtree(old, ignore_errors=True)


def load_base_tokenizer(text_model: str = ""):
    """The tokenizer of a local pretrained encoder (empty = the offline default model)."""
    from transformers import AutoTokenizer

    from .recipe import TextConfig
    from .text import text_model_dir

    path = text_model_dir(TextConfig(model=text_model))
    return AutoTokenizer.from_pretrained(str(path), local_files_only=True), str(path)


def shards_vocab_report(shards_dir: str | Path, split: str = "train", text_model: str = "", cap: int = 64,
                        scratch_vocab_size: int = 2000, top: int = 20) -> dict:
    """``align vocab``: the report over one split of a packed folder."""
    from .data.shards import load_table

    captions = load_table(shards_dir, split).captions
    tokenizer, path = load_base_tokenizer(text_model)
    report = vocab_report(captions, tokenizer, cap=cap, scratch_vocab_size=scratch_vocab_size, top=top,
                          text_model=path)
    report.update(shards=str(shards_dir), split=split)
    return report
