"""One contrastive training step: encode this rank's captions, gather the global batch, back-propagate.

Kept apart from the loop so the step's memory strategy can change without touching scheduling,
logging or checkpoints. Two strategies, one result:

* **Whole slice** (``chunk_size = 0``, or a chunk at least as large as this rank's slice): one
  forward with a graph, the embeddings gathered with autograd, one backward. Activation memory
  grows with the batch.
* **Gradient caching** (Gao et al. 2021, "GradCache"): (1) encode the slice chunk by chunk without
  a graph; (2) gather the global batch, compute the loss and its gradient with respect to the
  embeddings only; (3) re-encode each chunk with a graph and back-propagate the cached gradient of
  its rows. Only one chunk's activations are alive at a time, so memory no longer grows with the
  batch beyond the (B, D) embeddings, their gradient and the loss's (block_size, B) blocks. The
  price is one extra forward pass per step.

Exactness. By the chain rule, sum over chunks of J_chunk^T (dL/de)_chunk is dL/dtheta, provided the
re-encode computes the same function as the first pass. Dropout draws random masks, so each chunk
runs inside a forked RNG seeded from (step seed, the chunk's position in the global batch): the
first pass and the re-encode draw identical masks, the outer RNG stream is left untouched, and the
draw does not depend on which process holds the chunk. (A global batch cut into the same chunks on
one process or on several therefore sees the same dropout; the multi-process test relies on it.)

Host memory. glibc's malloc raises its mmap threshold each time a large block is freed (up to
32 MiB), after which activation-sized tensors come from the heap, and a heap fragmented by chunks
of changing shapes is not handed back: measured on a LoRA step at global batch 1,024 in chunks of
256, peak RSS 4.8 GiB with the default against 2.8 GiB with the threshold fixed at 1 MiB, for
about the same step time (152 s against 149 s on a busy machine). So on CPU the first step fixes it at 1 MiB (``mallopt``), unless the user set
``MALLOC_MMAP_THRESHOLD_`` themselves.

Length buckets. With ``length_buckets`` the slice is sorted by token count (stable) before it is cut
into chunks, and each chunk is trimmed to its own longest caption, so little compute goes to padding.
Padding is masked out of attention and pooling, so the embeddings do not depend on it; results
are put back in the original order before the loss sees them. The whole-slice path buckets too:
a slice of more than ``WHOLE_SLICE_BUCKET_ROWS`` captions is encoded in buckets of that many rows,
every bucket's graph alive until the one backward (the memory of one forward over the slice). Short
catalogue captions padded to the slice's longest waste about half the positions (measured on the
demo's captions: 13 tokens on average, 24 after padding), more than the smaller matrix products
cost. Each bucket draws its dropout from its own chunk seed, so this path computes exactly what
gradient caching computes with chunks of that size.

Precision. The encoder runs inside the step's autocast (bf16 or off, ``align.text.precision``); its
output is cast to fp32 and the loss always runs outside autocast, even when a caller wraps the whole
step in one: a log-sum-exp over the global batch in bf16 would lose the small differences between
logits that the gradient is made of. Every chunk of both gradient-caching passes runs under the
same autocast, so the replay computes the very function the first pass did.
"""
from __future__ import annotations

import ctypes
import os
import sys
from contextlib import contextmanager, nullcontext
from typing import Callable

import torch

from ..loss import gather_global
from ..seeding import stable_hash
from ..text import TextTower


def step_seed(seed: int, step: int) -> int:
    """The dropout seed of one optimizer step: a function of (train.seed, step) only, so a resumed
    run (or any process) draws the same masks the uninterrupted run would have drawn."""
    return stable_hash(f"step:{seed}:{step}")


def chunk_seed(seed_of_step: int, offset: int) -> int:
    """The seed of the chunk that starts at ``offset`` in the global batch."""
    return stable_hash(f"chunk:{seed_of_step}:{offset}")


def chunk_seeds(seed_of_step: int, chunks: list[torch.Tensor], first_row: int) -> list[int]:
    """Each chunk's seed, from its position in the global batch rather than its rank, so the same
    chunks draw the same dropout masks however the batch is spread over processes."""
    seeds, position = [], first_row
    for rows in chunks:
        seeds.append(chunk_seed(seed_of_step, position))
        position += len(rows)
    return seeds


@contextmanager
def seeded_rng(device: torch.device, seed: int):
    """Run the block with the CPU (and this CUDA device's) RNG seeded to ``seed``, then restore the
    state the block found: the replayed draws never shift the training run's own RNG stream."""
    devices = [device.index if device.index is not None else torch.cuda.current_device()] \
        if device.type == "cuda" else []
    with torch.random.fork_rng(devices=devices, device_type="cuda"):
        torch.manual_seed(seed)
        yield


_M_MMAP_THRESHOLD = -3  # glibc mallopt parameter number (malloc.h)
_allocator_checked = False


def bound_host_allocator(threshold: int = 1 << 20) -> bool:
    """Serve blocks of ``threshold`` bytes and more by mmap, so freed activations go back to the
    system at once (see "Host memory" above). Once per process; True when glibc took the setting."""
    global _allocator_checked
    if _allocator_checked:
        return False
    _allocator_checked = True
    if not sys.platform.startswith("linux") or "MALLOC_MMAP_THRESHOLD_" in os.environ:
        return False
    try:
        libc = ctypes.CDLL("libc.so.6")
        return bool(libc.mallopt(_M_MMAP_THRESHOLD, ctypes.c_int(threshold)))
    except (OSError, AttributeError):  # not glibc (musl, ...): leave its allocator alone
        return False


# Rows per bucket of the whole-slice path. Measured on slices of 64 demo captions, LoRA MiniLM, whole
# steps on one thread of a shared 2-core machine (three alternating rounds, noisy): one padded batch
# 42.6 / 79.2 pairs/s (fp32 / bf16), buckets of 16 81.7 / 130.7; buckets of 8 and of 32 were slower
# than 16 in both precisions
WHOLE_SLICE_BUCKET_ROWS = 16


def plan_chunks(attention_mask: torch.Tensor, chunk_size: int, length_buckets: bool) -> list[torch.Tensor]:
    """Row indices of each chunk of the slice (b rows), in encoding order.

    ``chunk_size <= 0`` (or >= b) gives one chunk. With ``length_buckets`` rows are ordered by
    token count (a stable sort, so equal lengths keep their order and the plan is deterministic).
    """
    rows = attention_mask.shape[0]
    if chunk_size <= 0 or chunk_size >= rows:
        return [torch.arange(rows)]  # one chunk: nothing to bucket
    if length_buckets:
        order = torch.sort(attention_mask.sum(dim=1), stable=True).indices  # (b,)
    else:
        order = torch.arange(rows)
    return list(torch.split(order, chunk_size))


def chunk_tokens(tokens: dict[str, torch.Tensor], rows: torch.Tensor, device: torch.device) -> dict[str, torch.Tensor]:
    """The chunk's rows, trimmed to the columns any of them uses (its own longest caption)."""
    mask = tokens["attention_mask"][rows]  # (c, T)
    used = mask.any(dim=0)  # (T,); contiguous for left or right padding
    return {k: v[rows][:, used].to(device) for k, v in tokens.items()}


def contrastive_step(model: torch.nn.Module, tower: TextTower, loss_fn: torch.nn.Module, captions: list[str],
                     image_features: torch.Tensor, caption_ids: torch.Tensor, label_ids: torch.Tensor | None,
                     accelerator, autocast, *, chunk_size: int = 0, length_buckets: bool = True,
                     seed: int | None = None) -> torch.Tensor:
    """Forward and backward for one step; returns the (detached) global loss.

    ``captions`` are this rank's slice (b); ``image_features``, ``caption_ids`` and ``label_ids``
    cover the whole global batch (B = world * b), identical on every rank, this rank's rows at
    ``rank * b``. ``seed`` fixes the step's dropout (see ``step_seed``); None draws one from the
    current torch RNG. Gradients are accumulated into the parameters' ``.grad``.
    """
    if accelerator.device.type == "cpu":
        bound_host_allocator()
    if seed is None:
        seed = int(torch.randint(0, 2 ** 62, (1,)))
    tokens = tower.tokenize(captions)  # (b, T), padded to the slice's longest caption
    whole_slice = chunk_size <= 0 or chunk_size >= len(captions)
    buckets = WHOLE_SLICE_BUCKET_ROWS if whole_slice and length_buckets else chunk_size
    chunks = plan_chunks(tokens["attention_mask"], buckets, length_buckets)
    first_row = accelerator.process_index * len(captions)  # where this slice starts in the global batch
    seeds = chunk_seeds(seed, chunks, first_row)
    no_autocast = torch.autocast(device_type=accelerator.device.type, enabled=False)

    def global_loss(text: torch.Tensor) -> torch.Tensor:  # (B, D) -> scalar, over the whole batch
        with no_autocast:  # fp32 whatever context the caller runs the step in (see "Precision")
            return loss_fn(text, image_features, caption_ids, label_ids)

    encode = _Encoder(model, tokens, accelerator.device, autocast)
    if whole_slice:
        return _whole_slice_step(encode, chunks, seeds, global_loss, accelerator)
    return _cached_gradient_step(encode, chunks, seeds, global_loss, accelerator, model, first_row)


class _Encoder:
    """Encodes rows of the slice's tokens under a chunk's seed (the same masks on every call)."""

    def __init__(self, model, tokens: dict[str, torch.Tensor], device: torch.device, autocast):
        self.model, self.tokens, self.device, self.autocast = model, tokens, device, autocast
        self.rows = tokens["attention_mask"].shape[0]

    def __call__(self, rows: torch.Tensor, seed: int) -> torch.Tensor:
        with seeded_rng(self.device, seed), self.autocast:
            return self.model(**chunk_tokens(self.tokens, rows, self.device)).float()  # (c, D)


def _whole_slice_step(encode: _Encoder, chunks: list[torch.Tensor], seeds: list[int], global_loss: Callable,
                      accelerator) -> torch.Tensor:
    """One forward (bucket by bucket, every graph alive) spanning the encoder and the loss, one backward."""
    if len(chunks) == 1:
        text = encode(chunks[0], seeds[0])  # (b, D), slice order
    else:
        order = torch.cat(chunks).to(encode.device)  # encoding order -> slice row
        encoded = torch.cat([encode(rows, seed) for rows, seed in zip(chunks, seeds)])  # (b, D), encoding order
        text = encoded[torch.argsort(order)]  # (b, D), slice order
    text = gather_global(text)  # (B, D); autograd flows back to each rank's own slice
    loss = global_loss(text)
    accelerator.backward(loss)
    return loss.detach()


def _cached_gradient_step(encode: _Encoder, chunks: list[torch.Tensor], seeds: list[int], global_loss: Callable,
                          accelerator, model, first_row: int) -> torch.Tensor:
    """Gradient caching: embed without a graph, take dL/d(embeddings) once, replay each chunk."""
    embedded = _embed_without_graph(encode, chunks, seeds)  # (b, D)
    loss, cached = _embedding_gradient(embedded, global_loss, accelerator, first_row)
    _replay_with_graph(encode, chunks, seeds, cached, accelerator, model)
    return loss


def _embed_without_graph(encode: _Encoder, chunks: list[torch.Tensor], seeds: list[int]) -> torch.Tensor:
    """Pass 1: embeddings of every chunk, no graph (activations freed chunk by chunk). (b, D)"""
    embedded = None
    with torch.no_grad():
        for rows, seed in zip(chunks, seeds):
            out = encode(rows, seed)  # (c, D)
            if embedded is None:
                embedded = out.new_empty(encode.rows, out.shape[1])  # (b, D) in the slice's own order
            embedded[rows.to(encode.device)] = out
    return embedded


def _embedding_gradient(embedded: torch.Tensor, global_loss: Callable, accelerator,
                        first_row: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Pass 2: the loss over the global batch, and its gradient w.r.t. this rank's embeddings only.

    Every rank computes the same loss on the same gathered rows; the loss's own parameters (scale,
    bias) get their full gradient here. Returns (detached loss, dL/d(own rows) (b, D)).
    """
    world, local = accelerator.num_processes, embedded.shape[0]
    with torch.no_grad():
        gathered = gather_global(embedded)  # (B, D)
    gathered = gathered.detach().requires_grad_(True)
    loss = global_loss(gathered)
    accelerator.backward(loss)
    cached = gathered.grad[first_row:first_row + local]  # (b, D)
    if world > 1:
        # The parameter gradients are averaged over ranks afterwards (DDP); the autograd all_gather
        # of the whole-slice path hands each rank world * dL/dx for the same reason.
        cached = cached * world
    return loss.detach(), cached


def _replay_with_graph(encode: _Encoder, chunks: list[torch.Tensor], seeds: list[int], cached: torch.Tensor,
                       accelerator, model) -> None:
    """Pass 3: re-encode each chunk with a graph (same dropout masks) and push its cached gradient
    through. Gradient sync across ranks waits for the last chunk."""
    last, world = len(chunks) - 1, accelerator.num_processes
    for j, (rows, seed) in enumerate(zip(chunks, seeds)):
        sync = nullcontext() if j == last or world == 1 else accelerator.no_sync(model)
        with sync:
            out = encode(rows, seed)  # (c, D)
            # Plain autograd (not accelerator.backward): a gradient scaler, if any, already
            # scaled the cached gradient through the loss's backward above.
            torch.autograd.backward(out, cached[rows.to(encode.device)])
