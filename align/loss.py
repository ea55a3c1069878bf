"""Contrastive losses over the global batch: symmetric InfoNCE (softmax) and the pairwise sigmoid loss.

Both losses take L2-normalised text and image embeddings of one global batch, ``(B, D)`` each
(row i of one is the pair of row i of the other), and optional ids that mark which other pairs in
the batch are positives too:

* ``caption_ids`` (B,): equal id = the same caption text;
* ``label_ids`` (B,): equal id = the same labels.

Pair (i, j) is positive iff ``i == j``, or their caption ids are equal, or their label ids are
equal. A negative id (-1) never matches anything but itself on the diagonal: a sample without
labels shares labels with nobody, and ``positive_ids(..., mode="pair")`` marks every caption -1 so
only the pair itself is positive. Catalogue data repeats captions, so without these ids two rows
with the same caption would be pushed apart as negatives.

Memory. With ``block_size = c > 0`` the logits are computed c rows at a time, so at most c x B
logits (and the matching c x B positive mask, built from the ids) are alive at once; a B x B
matrix is never formed. Each block runs under ``torch.utils.checkpoint``: the graph keeps only
the block's inputs (views of the embeddings that are alive anyway, the scalar scale and the ids)
and recomputes the c x B logits during backward, one block at a time. Without checkpointing,
autograd would keep every block's c x B intermediates, i.e. B x B in total again. The price is
compute: the softmax loss does one pass per direction (text->image rows, then image->text rows)
and each block is recomputed once in backward, about 8 B x B x D multiply-adds against 3 for the
plain loss (the sigmoid loss needs one pass: 4 against 3); next to the towers this is usually small. The recomputation is the same arithmetic
on the same inputs, so the gradient equals autograd through the blocks; it agrees with the plain
(block_size=0) loss up to floating-point summation order.

Precision. Logits are computed in at least float32 (bf16 or fp16 embeddings are upcast), because
a log-sum-exp over thousands of logits scaled by up to 100 loses too much in 8 mantissa bits.

Distributed training. ``gather_global`` and ``gather_ids`` concatenate each process's slice into
the global batch; every process then computes the same loss over all B rows.
"""
from __future__ import annotations

import math

import torch
import torch.distributed as dist
import torch.nn.functional as F
from torch import Tensor, nn
from torch.utils.checkpoint import checkpoint

from .labels import label_group
from .seeding import stable_hash as _stable_id  # ids agree across processes (hash() is salted)

POSITIVE_MODES = ("pair", "caption", "caption+labels")


# --------------------------------------------------------------------------- positives

def _canonical_caption(caption: str) -> str:
    # Captions that differ only in spacing are the same text to a reader and to the tokenizer.
    return " ".join(caption.split())


def positive_ids(captions: list[str], labels: list[dict] | None, mode: str) -> tuple[Tensor, Tensor | None]:
    """Ids that mark the in-batch positives for ``mode`` (the recipe's ``loss.positives``).

    Returns ``(caption_ids, label_ids)``, LongTensors of shape (B,). Ids are hashes of the caption
    text / of the labels' canonical text (``align.labels.label_group``), so they agree across
    processes and can be gathered into the global batch with ``gather_ids``. ``mode="pair"`` gives
    caption ids of -1 (only the pair itself is positive); ``label_ids`` is None unless mode is
    ``caption+labels`` and labels are given; an empty labels dict gets -1 (shares labels with nobody).
    """
    if mode not in POSITIVE_MODES:
        raise ValueError(f"positives mode {mode!r} is not one of {', '.join(map(repr, POSITIVE_MODES))}")
    if labels is not None and len(labels) != len(captions):
        raise ValueError(f"{len(captions)} captions but {len(labels)} label dicts")
    if mode == "pair":
        return torch.full((len(captions),), -1, dtype=torch.long), None
    caption_ids = torch.tensor([_stable_id(_canonical_caption(c)) for c in captions], dtype=torch.long)
    if mode == "caption" or labels is None:
        return caption_ids, None
    groups = [label_group(lab) for lab in labels]
    label_ids = torch.tensor([-1 if group is None else _stable_id(group) for group in groups], dtype=torch.long)
    return caption_ids, label_ids


def _positive_block(start: int, stop: int, batch: int, caption_ids: Tensor | None,
                    label_ids: Tensor | None, device: torch.device) -> Tensor:
    """Positive mask for rows start:stop against all B columns, (c, B) bool, built from the ids."""
    rows = torch.arange(start, stop, device=device)
    mask = rows[:, None] == torch.arange(batch, device=device)[None, :]  # (c, B) the pairs themselves
    for ids in (caption_ids, label_ids):
        if ids is None:
            continue
        row_ids = ids[start:stop, None]  # (c, 1)
        mask |= (row_ids == ids[None, :]) & (row_ids >= 0)
    return mask


# --------------------------------------------------------------------------- block kernels

def _softmax_rows(rows: Tensor, cols: Tensor, start: int, caption_ids: Tensor | None,
                  label_ids: Tensor | None, scale: Tensor) -> Tensor:
    """Sum over rows start:start+c of the soft-target cross entropy against all columns.

    Each row's target is uniform over its positives, so its loss is
    logsumexp_j(l_ij) - mean_{j positive} l_ij; with only the diagonal positive this is the
    ordinary cross entropy with label i.
    """
    logits = scale * (rows @ cols.T)  # (c, B)
    positives = _positive_block(start, start + rows.shape[0], cols.shape[0], caption_ids, label_ids,
                                rows.device).to(logits.dtype)  # (c, B)
    target_logit = (logits * positives).sum(dim=1) / positives.sum(dim=1)  # (c,)
    return (torch.logsumexp(logits, dim=1) - target_logit).sum()


def _sigmoid_rows(rows: Tensor, cols: Tensor, start: int, caption_ids: Tensor | None,
                  label_ids: Tensor | None, scale: Tensor, bias: Tensor) -> Tensor:
    """Sum over rows start:start+c of -log sigmoid(z_ij * l_ij), z = +1 on positives, -1 elsewhere."""
    logits = scale * (rows @ cols.T) + bias  # (c, B)
    positives = _positive_block(start, start + rows.shape[0], cols.shape[0], caption_ids, label_ids,
                                rows.device)  # (c, B)
    signs = positives.to(logits.dtype) * 2 - 1  # (c, B)
    return -F.logsigmoid(signs * logits).sum()


def _blocked_sum(kernel, rows: Tensor, cols: Tensor, block_size: int, caption_ids: Tensor | None,
                 label_ids: Tensor | None, *scalars: Tensor) -> Tensor:
    """``kernel`` summed over row blocks of ``block_size`` rows (0 = one block, no checkpointing)."""
    batch = rows.shape[0]
    if block_size <= 0 or block_size >= batch:
        return kernel(rows, cols, 0, caption_ids, label_ids, *scalars)
    # Checkpoint only when a graph is being built; in evaluation the blocks just run.
    recompute = torch.is_grad_enabled() and any(t.requires_grad for t in (rows, cols, *scalars))
    total = rows.new_zeros(())
    for start in range(0, batch, block_size):
        block = rows[start:start + block_size]  # (c, D)
        if recompute:
            # No randomness inside, so the RNG state need not be saved for the recomputation.
            total = total + checkpoint(kernel, block, cols, start, caption_ids, label_ids, *scalars,
                                       use_reentrant=False, preserve_rng_state=False)
        else:
            total = total + kernel(block, cols, start, caption_ids, label_ids, *scalars)
    return total


# --------------------------------------------------------------------------- modules

def _check_inputs(text: Tensor, image: Tensor, caption_ids: Tensor | None,
                  label_ids: Tensor | None) -> tuple[Tensor, Tensor, Tensor | None, Tensor | None]:
    if text.dim() != 2 or text.shape != image.shape:
        raise ValueError(f"text and image must both be (B, D) with the same shape, got "
                         f"{tuple(text.shape)} and {tuple(image.shape)}")
    if text.shape[0] == 0:
        raise ValueError("the batch is empty")
    out = []
    for name, ids in (("caption_ids", caption_ids), ("label_ids", label_ids)):
        if ids is not None:
            if ids.shape != (text.shape[0],):
                raise ValueError(f"{name} must have shape ({text.shape[0]},), got {tuple(ids.shape)}")
            ids = ids.to(device=text.device, dtype=torch.long)
        out.append(ids)
    # Upcast half-precision embeddings: see "Precision" in the module docstring.
    dtype = torch.promote_types(text.dtype, torch.float32)
    return text.to(dtype), image.to(dtype), out[0], out[1]


def _check_block_size(block_size: int) -> int:
    if not isinstance(block_size, int) or block_size < 0:
        raise ValueError(f"block_size must be 0 (all at once) or a positive number of rows, got {block_size!r}")
    return block_size


def _scalar(module: nn.Module, name: str, value: float, learnable: bool) -> None:
    """A learned scalar is a Parameter; a frozen one a buffer, so it is still saved with the state."""
    tensor = torch.tensor(float(value))
    if learnable:
        module.register_parameter(name, nn.Parameter(tensor))
    else:
        module.register_buffer(name, tensor)


class SoftmaxContrastiveLoss(nn.Module):
    """Symmetric InfoNCE with a learned temperature and multi-positive targets.

    ``logits = scale * text @ image.T``; the loss is the mean of the text->image and image->text
    cross entropies (rows, then columns). ``scale = exp(log_scale)`` clamped at
    ``max_logit_scale``; ``log_scale`` starts at ``log(1 / init_temperature)``. The clamp is on
    the value used, not on the parameter: above the limit the scale is exactly ``max_logit_scale``
    and ``log_scale`` gets zero gradient (it stays where it is until the clamp releases it).
    """

    def __init__(self, init_temperature: float = 0.07, max_logit_scale: float = 100.0,
                 learnable: bool = True, block_size: int = 0):
        super().__init__()
        if not 0 < init_temperature:
            raise ValueError(f"init_temperature must be positive, got {init_temperature}")
        if not max_logit_scale > 0:
            raise ValueError(f"max_logit_scale must be positive, got {max_logit_scale}")
        self.max_logit_scale = float(max_logit_scale)
        self.block_size = _check_block_size(block_size)
        _scalar(self, "log_scale", math.log(1.0 / init_temperature), learnable)

    @property
    def logit_scale(self) -> Tensor:
        return self.log_scale.exp().clamp(max=self.max_logit_scale)

    def temperature(self) -> float:
        """1 / the logit scale in use, for logging."""
        return 1.0 / float(self.logit_scale.detach())

    def metrics(self) -> dict[str, float]:
        return {"logit_scale": float(self.logit_scale.detach()), "temperature": self.temperature()}

    def forward(self, text: Tensor, image: Tensor, caption_ids: Tensor | None = None,
                label_ids: Tensor | None = None) -> Tensor:
        text, image, caption_ids, label_ids = _check_inputs(text, image, caption_ids, label_ids)
        scale = self.logit_scale.to(text.dtype)
        batch = text.shape[0]
        # The positive relation is symmetric, so both directions use the same ids.
        text_to_image = _blocked_sum(_softmax_rows, text, image, self.block_size, caption_ids, label_ids, scale)
        image_to_text = _blocked_sum(_softmax_rows, image, text, self.block_size, caption_ids, label_ids, scale)
        return (text_to_image + image_to_text) / (2 * batch)


class SigmoidContrastiveLoss(nn.Module):
    """Pairwise sigmoid loss: every (text, image) pair is an independent binary decision.

    ``logits = exp(t') * text @ image.T + b``, label +1 on positives (the same multi-positive
    rule as the softmax loss) and -1 elsewhere, loss = -sum(log sigmoid(label * logit)) / B.
    ``t'`` starts at ``log(init_scale)`` and ``b`` at ``init_bias``; the strongly negative bias
    keeps the B^2 - B negatives from dominating the first steps.
    """

    def __init__(self, init_scale: float = 10.0, init_bias: float = -10.0, learnable: bool = True,
                 block_size: int = 0):
        super().__init__()
        if not init_scale > 0:
            raise ValueError(f"init_scale must be positive, got {init_scale}")
        self.block_size = _check_block_size(block_size)
        _scalar(self, "log_scale", math.log(init_scale), learnable)
        _scalar(self, "bias", init_bias, learnable)

    @property
    def logit_scale(self) -> Tensor:
        return self.log_scale.exp()

    def temperature(self) -> float:
        """1 / the logit scale in use, for logging."""
        return 1.0 / float(self.logit_scale.detach())

    def metrics(self) -> dict[str, float]:
        return {"logit_scale": float(self.logit_scale.detach()), "logit_bias": float(self.bias.detach())}

    def forward(self, text: Tensor, image: Tensor, caption_ids: Tensor | None = None,
                label_ids: Tensor | None = None) -> Tensor:
        text, image, caption_ids, label_ids = _check_inputs(text, image, caption_ids, label_ids)
        scale, bias = self.logit_scale.to(text.dtype), self.bias.to(text.dtype)
        # The sum over all pairs does not depend on which side is the rows: one pass suffices.
        total = _blocked_sum(_sigmoid_rows, text, image, self.block_size, caption_ids, label_ids,
                             scale, bias)
        return total / text.shape[0]


def build_loss(cfg) -> nn.Module:
    """The loss a recipe's ``[loss]`` section (``align.recipe.LossConfig``) describes."""
    if cfg.kind == "softmax":
        return SoftmaxContrastiveLoss(init_temperature=cfg.init_temperature, max_logit_scale=cfg.max_logit_scale,
                                      learnable=cfg.learn_temperature, block_size=cfg.block_size)
    if cfg.kind == "sigmoid":
        return SigmoidContrastiveLoss(init_scale=cfg.init_sigmoid_scale, init_bias=cfg.init_sigmoid_bias,
                                      learnable=cfg.learn_temperature, block_size=cfg.block_size)
    raise ValueError(f"loss kind {cfg.kind!r} is not one of 'softmax', 'sigmoid'")


# --------------------------------------------------------------------------- distributed

def _world_size() -> int:
    return dist.get_world_size() if dist.is_available() and dist.is_initialized() else 1


def _check_equal_slices(x: Tensor, world: int) -> None:
    # all_gather needs the same shape on every rank; a ragged last batch would otherwise hang or
    # fail deep inside the backend. One tiny collective per call buys a clear message.
    size = torch.tensor([x.shape[0]], device=x.device, dtype=torch.long)
    sizes = [torch.empty_like(size) for _ in range(world)]
    dist.all_gather(sizes, size)
    counts = [int(s) for s in sizes]
    if len(set(counts)) > 1:
        raise ValueError(f"processes hold different local batch sizes {counts}; the global batch needs "
                         "equal slices (a batch size divisible by the number of processes)")


def gather_global(x: Tensor) -> Tensor:
    """Concatenate every process's (b, ...) slice into the global (W*b, ...) batch, with autograd.

    Why the gradient is right: every process computes the same global loss L on the gathered
    batch. The backward of ``torch.distributed.nn.functional.all_gather`` sums, over ranks, the
    gradient each rank holds for a slice, so rank r receives W * dL/dx_r for its own slice x_r.
    DDP then averages parameter gradients over the W ranks: (1/W) * sum_r J_r^T (W dL/dx_r) =
    sum_r J_r^T dL/dx_r = dL/dtheta, the gradient of a single process holding the whole batch.
    Parameters that reach L outside the gather (the loss's scale and bias) get dL/dp on every
    rank, and the average leaves that unchanged.

    Outside a process group (or with one process) x is returned unchanged.
    """
    world = _world_size()
    if world == 1:
        return x
    _check_equal_slices(x, world)
    from torch.distributed.nn.functional import all_gather
    return torch.cat(all_gather(x), dim=0)


def gather_ids(ids: Tensor | None) -> Tensor | None:
    """Concatenate every process's (b,) ids into the global (W*b,) ids; no gradient (ids are labels)."""
    world = _world_size()
    if ids is None or world == 1:
        return ids
    _check_equal_slices(ids, world)
    ids = ids.contiguous()
    parts = [torch.empty_like(ids) for _ in range(world)]
    dist.all_gather(parts, ids)
    return torch.cat(parts, dim=0)
