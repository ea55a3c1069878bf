"""Gradient caching (Gao et al. 2021) gives the gradient of the whole batch, on the real MiniLM towers.

What GradCache claims: with L the loss over the batch's embeddings e = f(x; theta) computed chunk by
chunk, dL/dtheta = sum over chunks of J_chunk^T (dL/de)_chunk, so encoding without a graph, taking
dL/de once, and re-encoding each chunk with a graph gives exactly the gradient of ordinary autograd
through everything at once. Two references:

* dropout on (MiniLM p = 0.1, LoRA dropout 0.1): ordinary autograd with every chunk's graph alive,
  each chunk drawing its dropout masks from the seed the step gives it (masks are drawn per tensor,
  so "the same randomness" can only mean the same draws for the same chunk). A re-encode that drew
  new masks would fail this: see test_dropout_is_on_and_replays_exactly.
* dropout off: the plain single forward over the whole, unbucketed, uncut batch.

Tolerance 1e-5 relative (from the issue), per tensor: max |g - g_ref| <= 1e-5 * max |g_ref|.
"""
from __future__ import annotations

import contextlib

import copy
from contextlib import contextmanager

import pytest
import torch
import torch.nn.functional as F
from accelerate import Accelerator

from align.loss import SigmoidContrastiveLoss, SoftmaxContrastiveLoss, positive_ids
from align.recipe import TextConfig
from align.training.step import chunk_seed, chunk_tokens, contrastive_step, plan_chunks, seeded_rng
from align.text import build_text_tower

DIM = 32
SEED = 1234
WORDS = ["zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine"]
# Caption lengths vary (3 to ~14 tokens) so buckets and trimming matter; repeats exercise the
# multi-positive ids.
CAPTIONS = [
    "a handwritten {}", "the digit {} written by hand with a slanted stroke and a small loop at the top",
    "a scanned {}, handwritten", "handwriting: the number {}", "{}", "a {} drawn quickly on lined paper",
]
BATCH = [CAPTIONS[i % len(CAPTIONS)].format(WORDS[(3 * i) % 7]) for i in range(14)]
NO_AUTOCAST = torch.autocast("cpu", enabled=False)


@pytest.fixture(scope="module", autouse=True)
def one_thread():
    # 14 short captions gain nothing from a second thread, and on a busy 2-core machine OpenMP
    # threads spinning against other processes made these steps ~10x slower (measured)
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(threads)


@pytest.fixture(scope="module")
def accelerator():
    return Accelerator(cpu=True)


@pytest.fixture(scope="module")
def towers():
    # the real offline MiniLM-L6, as LoRA (adapter dropout on too) and as a full fine-tune
    built = {kind: build_text_tower(TextConfig(kind=kind, max_length=24, lora_dropout=0.1), DIM, seed=0)
             for kind in ("lora", "full")}
    for tower in built.values():
        tower.train()
    return built


@pytest.fixture(scope="module")
def image_features():
    gen = torch.Generator().manual_seed(7)
    return F.normalize(torch.randn(len(BATCH), DIM, generator=gen), dim=-1)  # (B, D)


def _loss(kind: str):
    # block_size 5 so the loss itself runs blocked, as it would at scale
    return SoftmaxContrastiveLoss(block_size=5) if kind == "softmax" else SigmoidContrastiveLoss(block_size=5)


def _params(tower, loss_fn) -> dict[str, torch.nn.Parameter]:
    named = {f"text.{n}": p for n, p in tower.named_parameters() if p.requires_grad}
    return named | {f"loss.{n}": p for n, p in loss_fn.named_parameters() if p.requires_grad}


def _take_grads(params) -> dict[str, torch.Tensor]:
    grads = {n: (p.grad.clone() if p.grad is not None else torch.zeros_like(p)) for n, p in params.items()}
    for p in params.values():
        p.grad = None
    return grads


def _worst_relative(grads, reference) -> float:
    """max over tensors of max |g - g_ref| / max |g_ref|.

    A tensor whose exact gradient is zero holds only rounding noise, and noise over noise says
    nothing: the attention key biases are such (softmax is unchanged when the same number is
    added to every score, Vaswani et al. 2017's scaled dot-product attention), so a tensor is
    measured against at least 1e-6 of the largest gradient anywhere.
    """
    assert grads.keys() == reference.keys()
    floor = 1e-6 * max(float(ref.abs().max()) for ref in reference.values())
    return max(float((grads[name] - ref).abs().max()) / max(float(ref.abs().max()), floor)
               for name, ref in reference.items())


def _reference_with_all_graphs(tower, loss_fn, image, caption_ids, label_ids, chunk_size, buckets, seed, *,
                               batch=BATCH, autocast=None):
    """Plain autograd: every chunk encoded with its graph (same per-chunk seeds), one loss, one backward.
    With ``autocast``, each chunk's forward runs under it, entered once per chunk as the step enters
    it (autocast keeps one low-precision copy of each weight per entry)."""
    tokens = tower.tokenize(batch)
    pieces, start = [], 0
    for rows in plan_chunks(tokens["attention_mask"], chunk_size, buckets):
        with seeded_rng(torch.device("cpu"), chunk_seed(seed, start)), (autocast or contextlib.nullcontext()):
            pieces.append((rows, tower(**chunk_tokens(tokens, rows, torch.device("cpu"))).float()))
        start += len(rows)
    order = torch.cat([rows for rows, _ in pieces])
    text = torch.cat([emb for _, emb in pieces])[torch.argsort(order)]  # (B, D) in batch order
    loss = loss_fn(text, image, caption_ids, label_ids)
    loss.backward()
    return loss.detach()


@contextmanager
def _dropout_off(tower):
    layers = [m for m in tower.modules() if isinstance(m, torch.nn.Dropout)]
    saved = [m.p for m in layers]
    assert layers and max(saved) > 0  # the towers really have dropout to switch off
    for m in layers:
        m.p = 0.0
    try:
        yield
    finally:
        for m, p in zip(layers, saved):
            m.p = p


@pytest.mark.parametrize("kind,loss_kind,chunk_size,positives", [
    ("lora", "softmax", 4, "caption"),          # 14 rows -> chunks 4, 4, 4, 2
    ("full", "sigmoid", 5, "caption+labels"),   # 5, 5, 4
    ("lora", "sigmoid", 3, "pair"),             # 3, 3, 3, 3, 2
])
def test_gradcache_equals_autograd_through_every_chunk_dropout_on(
        towers, accelerator, image_features, kind, loss_kind, chunk_size, positives):
    tower, loss_fn = towers[kind], _loss(loss_kind)
    labels = [{"digit": c.split()[-1]} for c in BATCH]
    caption_ids, label_ids = positive_ids(BATCH, labels, positives)
    params = _params(tower, loss_fn)
    encoded_rows = []  # (rows, grad enabled) of every encoder call: the graph never spans more than a chunk
    hook = tower.encoder.register_forward_pre_hook(
        lambda module, args, kwargs: encoded_rows.append((kwargs["input_ids"].shape[0], torch.is_grad_enabled())),
        with_kwargs=True)
    rng_before = torch.get_rng_state()
    try:
        loss = contrastive_step(tower, tower, loss_fn, BATCH, image_features, caption_ids, label_ids, accelerator,
                                NO_AUTOCAST, chunk_size=chunk_size, length_buckets=True, seed=SEED)
    finally:
        hook.remove()
    # the seeded chunks ran in a forked RNG: the training run's own stream did not move
    assert torch.equal(torch.get_rng_state(), rng_before)
    cached = _take_grads(params)
    ref_loss = _reference_with_all_graphs(tower, loss_fn, image_features, caption_ids, label_ids, chunk_size,
                                          True, SEED)
    reference = _take_grads(params)

    assert max(rows for rows, _ in encoded_rows) == chunk_size
    assert sum(rows for rows, grad in encoded_rows if grad) == len(BATCH)  # each row re-encoded once
    assert torch.allclose(loss, ref_loss, rtol=1e-6, atol=0)
    worst = _worst_relative(cached, reference)
    print(f"{kind}/{loss_kind}/chunk {chunk_size}: worst relative gradient difference {worst:.2e}")
    assert worst <= 1e-5, worst


def test_gradcache_equals_one_uncut_forward_without_dropout(towers, accelerator, image_features):
    # Without randomness the whole batch in one forward (padded to its longest caption, unsorted)
    # is the reference; the chunked step sorts by length, trims each chunk's padding and re-encodes.
    # The two run matrix products of different shapes, whose float32 rounding differs by ~1e-6
    # after six layers and a backward pass; the tower runs in float64 here so that the comparison
    # sees the method, not the rounding (the loss stays float32: the tower casts its output).
    tower, loss_fn = copy.deepcopy(towers["full"]).double(), _loss("softmax")
    caption_ids, _ = positive_ids(BATCH, None, "caption")
    params = _params(tower, loss_fn)
    with _dropout_off(tower):
        contrastive_step(tower, tower, loss_fn, BATCH, image_features, caption_ids, None, accelerator,
                         NO_AUTOCAST, chunk_size=4, length_buckets=True, seed=SEED)
        cached = _take_grads(params)
        text = tower(**tower.tokenize(BATCH))  # (B, D)
        loss_fn(text, image_features, caption_ids, None).backward()
        reference = _take_grads(params)
    worst = _worst_relative(cached, reference)
    print(f"full/softmax, dropout off, float64 tower: worst relative gradient difference {worst:.2e}")
    assert worst <= 1e-5, worst


def test_dropout_is_on_and_replays_exactly(towers):
    # The first two tests would pass trivially if dropout did nothing; and a replay that drew new
    # masks would differ by this much.
    tower = towers["full"]
    tokens = tower.tokenize(BATCH[:4])
    rows = torch.arange(4)

    def encode(seed):
        with torch.no_grad(), seeded_rng(torch.device("cpu"), seed):
            return tower(**chunk_tokens(tokens, rows, torch.device("cpu")))

    assert torch.equal(encode(5), encode(5))
    assert float((encode(5) - encode(6)).abs().max()) > 1e-2


def test_length_buckets_cover_every_row_once_and_pad_less(towers):
    tower = towers["lora"]
    mask = tower.tokenize(BATCH)["attention_mask"]  # (B, T)
    lengths = mask.sum(dim=1)

    def padded_tokens(chunks):  # what the encoder computes on: rows x the chunk's longest caption
        return sum(len(rows) * int(lengths[rows].max()) for rows in chunks)

    bucketed, plain = plan_chunks(mask, 4, True), plan_chunks(mask, 4, False)
    for chunks in (bucketed, plain):
        assert sorted(torch.cat(chunks).tolist()) == list(range(len(BATCH)))
        assert [len(c) for c in chunks] == [4, 4, 4, 2]
    assert torch.equal(lengths[torch.cat(bucketed)], torch.sort(lengths, stable=True).values)
    assert padded_tokens(bucketed) < padded_tokens(plain) <= len(BATCH) * mask.shape[1]
    # each chunk is cut to its own longest caption
    tokens = tower.tokenize(BATCH)
    for rows in bucketed:
        assert chunk_tokens(tokens, rows, torch.device("cpu"))["input_ids"].shape == (len(rows), int(lengths[rows].max()))
    assert len(plan_chunks(mask, 0, True)) == 1 and len(plan_chunks(mask, len(BATCH), True)) == 1


# -- bf16 autocast and the whole slice in length buckets --------------------------------------------

BF16 = torch.autocast("cpu", dtype=torch.bfloat16)


@pytest.mark.parametrize("kind", ["lora", "full"])
def test_gradcache_under_bf16_equals_autograd_through_every_chunk(towers, accelerator, image_features, kind):
    # The chain-rule identity holds for any function the chunks compute, bf16 matrix products
    # included, provided both passes compute the same one: the step runs every chunk of both passes
    # under the autocast it is given, so the cached gradient must match the all-graphs reference
    # under the same autocast as tightly as in fp32 (1e-5, the tolerance above).
    tower, loss_fn = towers[kind], _loss("softmax")
    caption_ids, _ = positive_ids(BATCH, None, "caption")
    params = _params(tower, loss_fn)
    loss = contrastive_step(tower, tower, loss_fn, BATCH, image_features, caption_ids, None, accelerator, BF16,
                            chunk_size=4, length_buckets=True, seed=SEED)
    cached = _take_grads(params)
    ref_loss = _reference_with_all_graphs(tower, loss_fn, image_features, caption_ids, None, 4, True, SEED,
                                          autocast=BF16)
    reference = _take_grads(params)
    fp32_loss = _reference_with_all_graphs(tower, loss_fn, image_features, caption_ids, None, 4, True, SEED,
                                           autocast=NO_AUTOCAST)
    _take_grads(params)
    assert torch.allclose(loss, ref_loss, rtol=1e-6, atol=0)
    # and bf16 really ran: its loss is not the fp32 one, though close (8 mantissa bits, common practice)
    assert loss != fp32_loss and abs(float(loss - fp32_loss)) < 2e-2 * abs(float(fp32_loss))
    worst = _worst_relative(cached, reference)
    print(f"{kind}/softmax/chunk 4 under bf16: worst relative gradient difference {worst:.2e}")
    assert worst <= 1e-5, worst


def test_the_loss_runs_in_fp32_even_inside_a_callers_bf16_autocast(towers, accelerator, image_features):
    # Common practice (mixed-precision training): the log-sum-exp over the batch stays fp32. A caller
    # that wraps the whole step in bf16 autocast must not pull the loss's matrix product into bf16:
    # the step's loss must equal the loss computed in plain fp32 on the very embeddings it saw.
    tower, loss_fn = towers["lora"], _loss("softmax")
    caption_ids, _ = positive_ids(BATCH, None, "caption")
    seen = []
    hook = loss_fn.register_forward_pre_hook(lambda module, args: seen.append(
        (args[0].detach().clone(), args[0].dtype, torch.is_autocast_enabled("cpu"))))
    try:
        # a context of the caller's own (one autocast object must not be entered inside itself: its
        # exit restores the state saved by the inner entry, and autocast would stay on after it)
        with torch.autocast("cpu", dtype=torch.bfloat16):
            loss = contrastive_step(tower, tower, loss_fn, BATCH, image_features, caption_ids, None, accelerator,
                                    BF16, chunk_size=0, length_buckets=False, seed=SEED)
    finally:
        hook.remove()
    _take_grads(_params(tower, loss_fn))
    (text, dtype, autocast_on), = seen
    assert dtype == torch.float32 and not autocast_on
    with torch.no_grad():
        assert torch.equal(loss, loss_fn(text, image_features, caption_ids, None))


def test_whole_slice_in_length_buckets_is_gradient_caching_without_the_replay(
        towers, accelerator, image_features, monkeypatch):
    # The whole-slice path encodes a slice longer than WHOLE_SLICE_BUCKET_ROWS in length buckets of
    # that many rows, each under its chunk seed, every graph alive: the function gradient caching
    # computes with chunks of that size. Reference: plain autograd through every chunk (as above).
    import align.training.step as step_module
    monkeypatch.setattr(step_module, "WHOLE_SLICE_BUCKET_ROWS", 4)  # 14 rows -> buckets 4, 4, 4, 2
    tower, loss_fn = towers["lora"], _loss("softmax")
    caption_ids, _ = positive_ids(BATCH, None, "caption")
    params = _params(tower, loss_fn)
    encoded_rows = []
    hook = tower.encoder.register_forward_pre_hook(
        lambda module, args, kwargs: encoded_rows.append(kwargs["input_ids"].shape), with_kwargs=True)
    try:
        loss = contrastive_step(tower, tower, loss_fn, BATCH, image_features, caption_ids, None, accelerator,
                                NO_AUTOCAST, chunk_size=0, length_buckets=True, seed=SEED)
    finally:
        hook.remove()
    whole = _take_grads(params)
    ref_loss = _reference_with_all_graphs(tower, loss_fn, image_features, caption_ids, None, 4, True, SEED)
    reference = _take_grads(params)
    # one pass, no replay; each bucket trimmed to its own longest caption
    assert [rows for rows, _ in encoded_rows] == [4, 4, 4, 2]
    assert encoded_rows[0][1] < tower.tokenize(BATCH)["input_ids"].shape[1]  # the shortest bucket
    assert torch.allclose(loss, ref_loss, rtol=1e-6, atol=0)
    worst = _worst_relative(whole, reference)
    print(f"lora/softmax whole slice in buckets of 4: worst relative gradient difference {worst:.2e}")
    assert worst <= 1e-5, worst
