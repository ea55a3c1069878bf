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
tokenizer's model makes of that word in a caption (``align.text.tokenizers`` asks the tokenizer).
"""
from __future__ import annotations

from collections import Counter
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np
import torch

from ..errors import AlignError
from ..recipe import TextConfig
from .tokenizers import (copy_tokenizer, extend_tokenizer, load_pretrained_tokenizer, normalize, piece_ids,
                              pieces_of, read_term_record, record_matches, save_tokenizer_dir, term_record,
                              text_model_dir, train_scratch_tokenizer, words_of)

MIN_PIECES = 3  # a word in this many pieces or more counts as fragmented
MIN_COUNT = 2  # "auto" skips terms seen once: one caption is too little to learn a row from


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
# a tower's added terms: choosing them, their embedding rows, the run's record of them


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


def chosen_terms(cfg: TextConfig, tokenizer, train_captions: Sequence[str] | None) -> list[str]:
    """The recipe's terms (``text.new_tokens``: a list, or "auto" to mine the captions), resolved."""
    if cfg.new_tokens == "auto":
        if not train_captions:
            raise AlignError("text.new_tokens = \"auto\" mines the training captions, and none were given",
                             "train the run first (align train); evaluate and resume reuse its tokenizer folder")
        return resolve_terms(tokenizer, mine_terms(tokenizer, train_captions, cfg.new_tokens_cap))
    return resolve_terms(tokenizer, cfg.new_tokens)


def domain_vocabulary(cfg: TextConfig, encoder: torch.nn.Module, base_tokenizer, base_model: str,
                      train_captions: Sequence[str] | None, tokenizer_dir: Path | None):
    """Extend a pretrained tokenizer and embedding matrix; returns (tokenizer, new token ids).

    A vocabulary stored by this recipe in ``tokenizer_dir`` is reused (resume, evaluate): mined terms
    depend on the training captions, so they are never re-mined behind a checkpoint's back.
    """
    record = read_term_record(tokenizer_dir)
    if record_matches(record, cfg.new_tokens, cfg.new_tokens_cap, base_model):
        terms, new_ids = record["terms"], record["token_ids"]
        tokenizer = load_pretrained_tokenizer(Path(tokenizer_dir))
        if [int(i) for i in tokenizer.convert_tokens_to_ids(terms)] != new_ids or len(tokenizer) != len(
                base_tokenizer) + len(terms):
            raise AlignError(f"the tokenizer in {tokenizer_dir} does not match its {len(terms)} recorded terms",
                             "the run folder was edited; train the run again")
    else:
        if record is not None and not train_captions:
            raise AlignError(f"the vocabulary in {tokenizer_dir} was made by another recipe",
                             "evaluate or resume with the run's own recipe.resolved.toml")
        terms = chosen_terms(cfg, base_tokenizer, train_captions)
        tokenizer = copy_tokenizer(base_tokenizer)
        new_ids = extend_tokenizer(tokenizer, terms)
        if tokenizer_dir is not None:
            save_tokenizer_dir(tokenizer, Path(tokenizer_dir),
                               term_record(cfg.new_tokens, cfg.new_tokens_cap, terms, new_ids, base_tokenizer,
                                           base_model))
    if terms:
        extend_embeddings(encoder, base_tokenizer, terms, new_ids)
    return tokenizer, new_ids


# ---------------------------------------------------------------------------------------------
# align vocab


def load_base_tokenizer(text_model: str = ""):
    """The tokenizer of a local pretrained encoder (empty = the offline default model)."""
    path = text_model_dir(TextConfig(model=text_model))
    return load_pretrained_tokenizer(path), str(path)


def shards_vocab_report(shards_dir: str | Path, split: str = "train", text_model: str = "", cap: int = 64,
                        scratch_vocab_size: int = 2000, top: int = 20) -> dict:
    """``align vocab``: the report over one split of a packed folder."""
    from ..data.shards import load_table

    captions = load_table(shards_dir, split).captions
    tokenizer, path = load_base_tokenizer(text_model)
    report = vocab_report(captions, tokenizer, cap=cap, scratch_vocab_size=scratch_vocab_size, top=top,
                          text_model=path)
    report.update(shards=str(shards_dir), split=split)
    return report
