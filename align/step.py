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
are put back in the original order before the loss sees them.
"""
from __future__ import annotations

import ctypes
import hashlib
import os
import sys
from contextlib import contextmanager, nullcontext

import torch

from .loss import gather_global
from .text import TextTower


def step_seed(seed: int, step: int) -> int:
    """The dropout seed of one optimizer step: a function of (train.seed, step) only, so a resumed
    run (or any process) draws the same masks the uninterrupted run would have drawn."""
    return _mix(f"step:{seed}:{step}")


def chunk_seed(seed_of_step: int, offset: int) -> int:
    """The seed of the chunk that starts at ``offset`` in the global batch."""
    return _mix(f"chunk:{seed_of_step}:{offset}")


def _mix(text: str) -> int:
    # A 63-bit hash that is the same in every process (unlike Python's salted hash()).
    return int.from_bytes(hashlib.blake2b(text.encode(), digest_size=8).digest(), "little") >> 1


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


def _encode(model, tokens, rows, device, seed, autocast) -> torch.Tensor:
    with seeded_rng(device, seed), autocast:
        return model(**chunk_tokens(tokens, rows, device)).float()  # (c, D)


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
    device = accelerator.device
    if device.type == "cpu":
        bound_host_allocator()
    world, rank = accelerator.num_processes, accelerator.process_index
    if seed is None:
        seed = int(torch.randint(0, 2 ** 62, (1,)))
    tokens = tower.tokenize(captions)  # (b, T), padded to the slice's longest caption
    local = len(captions)
    first_row = rank * local  # where this slice starts in the global batch
    chunks = plan_chunks(tokens["attention_mask"], chunk_size, length_buckets)
    # A chunk's seed follows its position in the global batch, not its rank, so the same chunks
    # draw the same dropout masks however the batch is spread over processes.
    starts, position = [], first_row
    for rows in chunks:
        starts.append(position)
        position += len(rows)
    seeds = [chunk_seed(seed, start) for start in starts]

    if len(chunks) == 1:
        # Whole slice: the graph spans the encoder and the loss.
        text = _encode(model, tokens, chunks[0], device, seeds[0], autocast)  # (b, D), slice order
        text = gather_global(text)  # (B, D); autograd flows back to each rank's own slice
        loss = loss_fn(text, image_features, caption_ids, label_ids)
        accelerator.backward(loss)
        return loss.detach()

    # Pass 1: embeddings of every chunk, no graph (activations freed chunk by chunk).
    embedded = None
    with torch.no_grad():
        for rows, chunk_seed_ in zip(chunks, seeds):
            out = _encode(model, tokens, rows, device, chunk_seed_, autocast)  # (c, D)
            if embedded is None:
                embedded = out.new_empty(local, out.shape[1])  # (b, D) in the slice's own order
            embedded[rows.to(device)] = out

    # Pass 2: the loss over the global batch, and its gradient w.r.t. the embeddings only. Every
    # rank computes the same loss on the same gathered rows; the loss's own parameters (scale,
    # bias) get their full gradient here.
    with torch.no_grad():
        gathered = gather_global(embedded)  # (B, D)
    gathered = gathered.detach().requires_grad_(True)
    loss = loss_fn(gathered, image_features, caption_ids, label_ids)
    accelerator.backward(loss)
    cached = gathered.grad[first_row:first_row + local]  # (b, D) dL/d(own rows)
    if world > 1:
        # The parameter gradients are averaged over ranks afterwards (DDP); the autograd all_gather
        # of the whole-slice path hands each rank world * dL/dx for the same reason.
        cached = cached * world
    del gathered

    # Pass 3: re-encode each chunk with a graph (same dropout masks) and push its cached gradient
    # through. Gradient sync across ranks waits for the last chunk.
    last = len(chunks) - 1
    for j, (rows, chunk_seed_) in enumerate(zip(chunks, seeds)):
        sync = nullcontext() if j == last or world == 1 else accelerator.no_sync(model)
        with sync:
            out = _encode(model, tokens, rows, device, chunk_seed_, autocast)  # (c, D)
            # Plain autograd (not accelerator.backward): a gradient scaler, if any, already
            # scaled the cached gradient through the loss's backward above.
            torch.autograd.backward(out, cached[rows.to(device)])
    return loss.detach()
