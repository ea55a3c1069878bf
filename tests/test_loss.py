"""Contrastive losses against the papers' pseudo-code, numpy re-implementations and a real
two-process gloo group.

Sources named beside the checks:
* CLIP: Radford et al. 2021, "Learning Transferable Visual Models From Natural Language
  Supervision", Fig. 3 (numpy-like pseudo-code of the symmetric loss) and Sec. 2.5 (temperature
  initialised to 0.07, logit scale clipped at 100).
* SigLIP: Zhai et al. 2023, "Sigmoid Loss for Language Image Pre-Training", Algorithm 1 and Sec. 3
  (t' = log 10, b = -10 at initialisation).
Constants are quoted from memory of those papers.
"""
from __future__ import annotations

import math
import socket

import numpy as np
import pytest
import torch
import torch.nn.functional as F

from align.loss import (SigmoidContrastiveLoss, SoftmaxContrastiveLoss, build_loss, gather_global,
                        gather_ids, positive_ids)
from align.recipe import LossConfig


# --------------------------------------------------------------------------- independent numpy references

def np_logsumexp(x: np.ndarray, axis: int) -> np.ndarray:
    top = x.max(axis=axis, keepdims=True)
    return (top + np.log(np.exp(x - top).sum(axis=axis, keepdims=True))).squeeze(axis)


def np_cross_entropy(logits: np.ndarray, labels: np.ndarray, axis: int) -> float:
    """Mean cross entropy with the softmax taken along ``axis`` (Fig. 3's cross_entropy_loss)."""
    log_probs = logits - np.expand_dims(np_logsumexp(logits, axis), axis)
    n = logits.shape[0]
    picked = log_probs[labels, np.arange(n)] if axis == 0 else log_probs[np.arange(n), labels]
    return float(-picked.mean())


def np_clip_loss(image_e: np.ndarray, text_e: np.ndarray, t: float) -> float:
    """Radford et al. 2021, Fig. 3, line by line."""
    logits = np.dot(image_e, text_e.T) * np.exp(t)  # scaled pairwise cosine similarities [n, n]
    labels = np.arange(logits.shape[0])
    loss_i = np_cross_entropy(logits, labels, axis=0)
    loss_t = np_cross_entropy(logits, labels, axis=1)
    return (loss_i + loss_t) / 2


def np_positive_mask(caption_ids, label_ids, n: int) -> np.ndarray:
    """Pair (i, j) positive iff i == j, same caption id, or same label id >= 0 (the module's rule)."""
    mask = np.eye(n, dtype=bool)
    for ids in (caption_ids, label_ids):
        if ids is not None:
            ids = np.asarray(ids)
            mask |= (ids[:, None] == ids[None, :]) & (ids[:, None] >= 0)
    return mask


def np_soft_target_loss(text_e, image_e, scale, positives) -> float:
    """Symmetric soft-target cross entropy: each row's target is uniform over its positives."""
    def one_direction(logits):
        log_probs = logits - np_logsumexp(logits, axis=1)[:, None]
        target = positives / positives.sum(axis=1, keepdims=True)
        return float(-(target * log_probs).sum(axis=1).mean())
    logits = scale * text_e @ image_e.T
    return (one_direction(logits) + one_direction(logits.T)) / 2


def np_sigmoid_loss(image_e, text_e, t_prime, b, positives=None) -> float:
    """Zhai et al. 2023, Algorithm 1 (labels = 2 * eye(n) - ones(n), or +1 on every positive)."""
    n = image_e.shape[0]
    t = np.exp(t_prime)
    logits = np.dot(image_e, text_e.T) * t + b
    labels = 2 * (np.eye(n) if positives is None else positives.astype(float)) - np.ones((n, n))
    log_sigmoid = -np.logaddexp(0.0, -labels * logits)
    return float(-np.sum(log_sigmoid) / n)


def random_pairs(n: int, d: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    text = rng.normal(size=(n, d))
    image = text + 0.8 * rng.normal(size=(n, d))  # correlated, like a half-trained tower
    text /= np.linalg.norm(text, axis=1, keepdims=True)
    image /= np.linalg.norm(image, axis=1, keepdims=True)
    return text, image


def as_leaf(x: np.ndarray) -> torch.Tensor:
    return torch.tensor(x, dtype=torch.float64, requires_grad=True)


# --------------------------------------------------------------------------- softmax loss

def test_softmax_equals_clip_pseudo_code():
    # Source: Radford et al. 2021, Fig. 3 (independent numpy implementation above); all ids distinct.
    text, image = random_pairs(12, 16, seed=0)
    loss_fn = SoftmaxContrastiveLoss().double()
    with torch.no_grad():
        loss_fn.log_scale.fill_(math.log(7.5))  # away from the init, so t is really threaded through
    ids = torch.arange(12)
    ours = loss_fn(torch.tensor(text), torch.tensor(image), caption_ids=ids, label_ids=ids).item()
    assert ours == pytest.approx(np_clip_loss(image, text, math.log(7.5)), abs=1e-6)
    # No ids at all means the same thing as all ids distinct.
    assert loss_fn(torch.tensor(text), torch.tensor(image)).item() == pytest.approx(ours, abs=1e-12)


@pytest.mark.parametrize("block_size", [0, 3])
def test_equal_logits_give_log_batch(block_size):
    # Source: with all logits equal, softmax is uniform over B, so CE = ln(B) in both directions
    # (definition of cross entropy); holds for any positive set since targets sum to one.
    n = 7
    same = F.normalize(torch.ones(n, 5, dtype=torch.float64), dim=1)
    loss_fn = SoftmaxContrastiveLoss(block_size=block_size).double()
    assert loss_fn(same, same).item() == pytest.approx(math.log(n), abs=1e-9)
    caption_ids = torch.tensor([0, 0, 1, 2, 2, 2, 3])
    assert loss_fn(same, same, caption_ids).item() == pytest.approx(math.log(n), abs=1e-9)


def test_init_constants():
    # Source: Radford et al. 2021, Sec. 2.5: temperature initialised to 0.07, logits scaled by at most 100.
    softmax = SoftmaxContrastiveLoss()
    assert softmax.temperature() == pytest.approx(0.07, rel=1e-6)
    assert softmax.max_logit_scale == 100.0
    assert softmax.log_scale.item() == pytest.approx(math.log(1 / 0.07), rel=1e-6)
    # Source: Zhai et al. 2023, Algorithm 1 and Sec. 3: t' = log 10, b = -10.
    sigmoid = SigmoidContrastiveLoss()
    assert sigmoid.log_scale.item() == pytest.approx(math.log(10), rel=1e-6)
    assert sigmoid.bias.item() == -10.0
    # The recipe's defaults build the same thing.
    built = build_loss(LossConfig())
    assert isinstance(built, SoftmaxContrastiveLoss) and built.temperature() == pytest.approx(0.07, rel=1e-6)
    built = build_loss(LossConfig(kind="sigmoid"))
    assert isinstance(built, SigmoidContrastiveLoss) and built.metrics()["logit_bias"] == -10.0


def test_logit_scale_clamp_is_exact_and_stops_the_gradient():
    # Source: Radford et al. 2021, Sec. 2.5 (clip at 100). Documented behaviour: the clamp applies
    # to the value used, so above it the scale is exactly 100 and log_scale gets zero gradient.
    text, image = (torch.tensor(x) for x in random_pairs(6, 8, seed=1))
    loss_fn = SoftmaxContrastiveLoss().double()
    loss_fn(text, image).backward()
    assert loss_fn.log_scale.grad.abs().item() > 1e-6  # below the clamp it does learn
    loss_fn.log_scale.grad = None
    with torch.no_grad():
        loss_fn.log_scale.fill_(math.log(200.0))
    assert loss_fn.logit_scale.item() == 100.0
    loss = loss_fn(text, image)
    loss.backward()
    assert loss_fn.log_scale.grad.item() == 0.0
    assert loss.item() == pytest.approx(np_clip_loss(image.numpy(), text.numpy(), math.log(100.0)), abs=1e-6)


def test_frozen_temperature_is_a_buffer():
    # Common practice: a frozen scalar is saved with the state but not handed to the optimizer.
    loss_fn = SoftmaxContrastiveLoss(learnable=False)
    assert list(loss_fn.parameters()) == [] and "log_scale" in loss_fn.state_dict()
    sigmoid = SigmoidContrastiveLoss(learnable=False)
    assert list(sigmoid.parameters()) == [] and {"log_scale", "bias"} <= set(sigmoid.state_dict())
    assert len(list(SigmoidContrastiveLoss().parameters())) == 2


# --------------------------------------------------------------------------- multi-positive targets

def test_multi_positive_equals_soft_target_reference():
    # Source: independent numpy soft-target cross entropy (targets uniform over each row's positives).
    n = 10
    text, image = random_pairs(n, 12, seed=2)
    caption_ids = np.array([0, 1, 1, 2, 3, 4, 4, 4, 5, 6])
    label_ids = np.array([7, 8, -1, 7, -1, 9, 10, 11, 9, -1])  # -1 = no labels, never matches
    positives = np_positive_mask(caption_ids, label_ids, n)
    assert positives[0, 3] and positives[5, 8] and not positives[2, 4]  # the reference rule itself
    loss_fn = SoftmaxContrastiveLoss().double()
    scale = loss_fn.logit_scale.item()
    ours = loss_fn(torch.tensor(text), torch.tensor(image), torch.tensor(caption_ids), torch.tensor(label_ids))
    assert ours.item() == pytest.approx(np_soft_target_loss(text, image, scale, positives), abs=1e-6)
    # With only the diagonal positive the soft-target loss is Fig. 3's loss (the reduction claimed).
    assert np_soft_target_loss(text, image, scale, np.eye(n, dtype=bool)) == pytest.approx(
        np_clip_loss(image, text, math.log(scale)), abs=1e-9)


def _separation_rate(loss_fn, text, image, caption_ids, label_ids, a: int, b: int) -> float:
    """d/ds ||t_a - t_b||^2 + ||i_a - i_b||^2 under a gradient-descent step s (>0 = pushed apart)."""
    text, image = as_leaf(text), as_leaf(image)
    loss_fn(text, image, caption_ids, label_ids).backward()
    rate = 0.0
    for emb in (text, image):
        diff = (emb[a] - emb[b]).detach()
        rate += float(2 * diff @ -(emb.grad[a] - emb.grad[b]))
    return rate


@pytest.mark.parametrize("share", ["caption", "labels"])
def test_shared_caption_or_labels_are_not_pushed_apart(share):
    # Source: the soft-target reference above: a row's target puts weight 1/|P| on each positive,
    # so while p_ab < 1/|P| the gradient raises s_ab (pulls a and b together); plain InfoNCE
    # (Radford et al. 2021, Fig. 3) treats b as a negative of a and pushes them apart.
    n = 8
    text, image = random_pairs(n, 16, seed=3)
    text[1] = text[0] + 0.9 * text[1]  # rows 0 and 1: two wordings / two dropout draws of one caption
    text[1] /= np.linalg.norm(text[1])
    distinct = torch.arange(n)
    shared = distinct.clone()
    shared[1] = 0
    caption_ids, label_ids = (shared, None) if share == "caption" else (distinct, shared)
    loss_fn = SoftmaxContrastiveLoss().double()
    assert _separation_rate(loss_fn, text, image, caption_ids, label_ids, 0, 1) < 0
    assert _separation_rate(loss_fn, text, image, distinct, None, 0, 1) > 0  # the plain loss does push


def test_unlabelled_rows_do_not_match_each_other():
    # Source: numpy reference rule (label id -1 never matches): two unlabelled rows = all ids distinct.
    text, image = (torch.tensor(x) for x in random_pairs(5, 6, seed=4))
    loss_fn = SoftmaxContrastiveLoss().double()
    unlabelled = torch.full((5,), -1)
    assert loss_fn(text, image, None, unlabelled).item() == pytest.approx(
        np_clip_loss(image.numpy(), text.numpy(), math.log(1 / 0.07)), abs=1e-6)


def test_positive_ids_modes():
    # Source: the recipe's loss.positives choices (align.recipe.LossConfig); ids agree across calls
    # (a stand-in for "across processes": the hash is not Python's salted hash()).
    captions = ["cobalt chevron tile", "cobalt  chevron tile", "sage terrazzo", "ochre hex"]
    labels = [{"glaze": "cobalt", "pattern": "chevron"}, {"pattern": "chevron", "glaze": "cobalt"}, {}, {}]
    cap, lab = positive_ids(captions, labels, "caption+labels")
    assert cap[0] == cap[1] and len(set(cap.tolist())) == 3  # spacing does not make a new caption
    assert lab[0] == lab[1] and lab[2] == -1 and lab[3] == -1  # key order does not matter; {} = -1
    assert torch.equal(positive_ids(captions, labels, "caption+labels")[0], cap)
    cap, lab = positive_ids(captions, labels, "caption")
    assert lab is None and cap[0] == cap[1]
    cap, lab = positive_ids(captions, labels, "pair")
    assert lab is None and (cap == -1).all()
    with pytest.raises(ValueError, match="'labels' is not one of"):
        positive_ids(captions, labels, "labels")


# --------------------------------------------------------------------------- blocked computation

def _loss_and_grads(loss_fn, text, image, caption_ids, label_ids):
    text, image = as_leaf(text), as_leaf(image)
    for p in loss_fn.parameters():
        p.grad = None
    loss = loss_fn(text, image, caption_ids, label_ids)
    loss.backward()
    return loss.item(), text.grad, image.grad, [p.grad.clone() for p in loss_fn.parameters()]


@pytest.mark.parametrize("kind", ["softmax", "sigmoid"])
@pytest.mark.parametrize("block_size", [1, 3, 5, 11])
def test_blocked_equals_plain(kind, block_size):
    # Source: the plain loss of this module, itself checked against the papers' pseudo-code above;
    # blocking must change neither the value nor any gradient. 3 does not divide B = 10; 11 > B.
    n = 10
    text, image = random_pairs(n, 8, seed=5)
    caption_ids = torch.tensor([0, 1, 1, 2, 3, 4, 4, 5, 6, 7])
    label_ids = torch.tensor([0, 1, -1, 0, -1, 2, 3, 2, -1, 4])
    make = (lambda c: SoftmaxContrastiveLoss(block_size=c)) if kind == "softmax" else \
        (lambda c: SigmoidContrastiveLoss(block_size=c, init_bias=-3.0))
    plain = _loss_and_grads(make(0).double(), text, image, caption_ids, label_ids)
    blocked = _loss_and_grads(make(block_size).double(), text, image, caption_ids, label_ids)
    assert blocked[0] == pytest.approx(plain[0], abs=1e-12)
    for got, want in zip(blocked[1:3] + tuple(blocked[3]), plain[1:3] + tuple(plain[3])):
        torch.testing.assert_close(got, want, rtol=0, atol=1e-12)


def test_blocked_loss_never_forms_a_batch_by_batch_tensor():
    # Source: the memory contract in align/loss.py's docstring (at most c x B logits alive); every
    # tensor any op produces in forward and backward is recorded through a dispatch mode.
    from torch.utils._python_dispatch import TorchDispatchMode

    class LargestTensor(TorchDispatchMode):
        largest = 0

        def __torch_dispatch__(self, func, types, args=(), kwargs=None):
            out = func(*args, **(kwargs or {}))
            for t in out if isinstance(out, (tuple, list)) else (out,):
                if isinstance(t, torch.Tensor):
                    LargestTensor.largest = max(LargestTensor.largest, t.numel())
            return out

    n, d, c = 64, 4, 8
    text, image = (as_leaf(x) for x in random_pairs(n, d, seed=6))
    ids = torch.arange(n) // 2
    for loss_fn in (SoftmaxContrastiveLoss(block_size=c), SigmoidContrastiveLoss(block_size=c)):
        LargestTensor.largest = 0
        with LargestTensor():
            loss_fn.double()(text, image, ids).backward()
        assert c * n <= LargestTensor.largest < n * n  # c x B blocks were seen, B x B never
    LargestTensor.largest = 0
    with LargestTensor():
        SoftmaxContrastiveLoss().double()(text, image, ids).backward()
    assert LargestTensor.largest >= n * n  # the probe does see a B x B matrix when one is made


def test_blocked_graph_keeps_no_logits():
    # Source: the memory contract in align/loss.py's docstring (checkpointed blocks: the graph keeps
    # the blocks' inputs, not their c x B logits), measured with torch.autograd.graph.saved_tensors_hooks.
    from torch.autograd.graph import saved_tensors_hooks

    n, d, c = 64, 4, 8
    text, image = (as_leaf(x) for x in random_pairs(n, d, seed=6))
    ids = torch.arange(n) // 2

    def saved_shapes(loss_fn) -> set:
        shapes = set()
        with saved_tensors_hooks(lambda t: shapes.add(tuple(t.shape)) or t, lambda t: t):
            loss_fn.double()(text, image, ids)
        return shapes

    for make in (SoftmaxContrastiveLoss, SigmoidContrastiveLoss):
        blocked = saved_shapes(make(block_size=c))
        assert (c, d) in blocked and (c, n) not in blocked  # block inputs kept, block logits not
        assert (n, n) in saved_shapes(make(block_size=0))  # the plain loss keeps its B x B logits


# --------------------------------------------------------------------------- sigmoid loss

def test_sigmoid_equals_algorithm_1():
    # Source: Zhai et al. 2023, Algorithm 1 (independent numpy implementation above).
    text, image = random_pairs(9, 10, seed=7)
    loss_fn = SigmoidContrastiveLoss(init_scale=3.0, init_bias=-2.0).double()
    ours = loss_fn(torch.tensor(text), torch.tensor(image)).item()
    assert ours == pytest.approx(np_sigmoid_loss(image, text, math.log(3.0), -2.0), abs=1e-6)
    # At the paper's initialisation too (t' = log 10, b = -10).
    ours = SigmoidContrastiveLoss().double()(torch.tensor(text), torch.tensor(image)).item()
    assert ours == pytest.approx(np_sigmoid_loss(image, text, math.log(10.0), -10.0), abs=1e-6)


def test_sigmoid_multi_positive_labels():
    # Source: Algorithm 1 with labels +1 on every positive pair (numpy reference above).
    n = 8
    text, image = random_pairs(n, 6, seed=8)
    caption_ids = np.array([0, 0, 1, 2, 2, 2, 3, 4])
    label_ids = np.array([-1, -1, 5, -1, 6, 7, 5, -1])
    loss_fn = SigmoidContrastiveLoss(init_scale=4.0, init_bias=-1.0).double()
    ours = loss_fn(torch.tensor(text), torch.tensor(image), torch.tensor(caption_ids), torch.tensor(label_ids))
    want = np_sigmoid_loss(image, text, math.log(4.0), -1.0, np_positive_mask(caption_ids, label_ids, n))
    assert ours.item() == pytest.approx(want, abs=1e-6)


# --------------------------------------------------------------------------- errors

def test_bad_settings_and_inputs_say_what_is_wrong():
    # Common practice: a bad setting names the parameter, shape mistakes name both shapes. The loss is
    # pure: plain ValueErrors; the recipe names its own keys before any loss is built (test_recipe.py).
    with pytest.raises(ValueError, match="block_size must be 0"):
        build_loss(LossConfig(block_size=-1))
    with pytest.raises(ValueError, match="init_scale must be positive"):
        build_loss(LossConfig(kind="sigmoid", init_sigmoid_scale=0.0))
    with pytest.raises(ValueError, match="max_logit_scale must be positive"):
        build_loss(LossConfig(max_logit_scale=0.0))
    with pytest.raises(ValueError, match="loss kind 'hinge'"):
        build_loss(LossConfig(kind="hinge"))
    with pytest.raises(ValueError, match=r"\(4, 3\) and \(5, 3\)"):
        SoftmaxContrastiveLoss()(torch.zeros(4, 3), torch.zeros(5, 3))
    with pytest.raises(ValueError, match="caption_ids"):
        SoftmaxContrastiveLoss()(torch.zeros(4, 3), torch.zeros(4, 3), torch.zeros(3, dtype=torch.long))


def test_half_precision_embeddings_are_upcast():
    # Common practice: the log-sum-exp runs in fp32 even for bf16 embeddings.
    text, image = random_pairs(6, 8, seed=9)
    loss = SoftmaxContrastiveLoss()(torch.tensor(text).bfloat16(), torch.tensor(image).bfloat16())
    assert loss.dtype == torch.float32
    want = np_clip_loss(torch.tensor(image).bfloat16().double().numpy(),
                        torch.tensor(text).bfloat16().double().numpy(), math.log(1 / 0.07))
    assert loss.item() == pytest.approx(want, abs=1e-4)


# --------------------------------------------------------------------------- distributed gather

WORLD, LOCAL, FEATURES, DIM = 2, 4, 6, 5


def _tower_inputs():
    """A tiny linear 'tower' per side and a global batch of 8 inputs with cross-rank duplicates."""
    rng = np.random.default_rng(10)
    return {"x_text": torch.tensor(rng.normal(size=(WORLD * LOCAL, FEATURES))),
            "x_image": torch.tensor(rng.normal(size=(WORLD * LOCAL, FEATURES))),
            "w_text": torch.tensor(rng.normal(size=(FEATURES, DIM))),
            "w_image": torch.tensor(rng.normal(size=(FEATURES, DIM))),
            # rows 1 and 6 (ranks 0 and 1) share a caption; 2 and 3 share labels
            "caption_ids": torch.tensor([0, 1, 2, 3, 4, 5, 1, 7]),
            "label_ids": torch.tensor([-1, -1, 9, 9, -1, 8, -1, -1])}


def _step(inputs, rows: slice, gather):
    """One loss step on the given rows; returns loss, local embedding grads and parameter grads."""
    w_text = inputs["w_text"].clone().requires_grad_()
    w_image = inputs["w_image"].clone().requires_grad_()
    loss_fn = SoftmaxContrastiveLoss().double()
    text = F.normalize(inputs["x_text"][rows] @ w_text, dim=1)  # (b, D)
    image = F.normalize(inputs["x_image"][rows] @ w_image, dim=1)  # (b, D)
    text.retain_grad()
    image.retain_grad()
    loss = loss_fn(gather(text), gather(image), gather_ids(inputs["caption_ids"][rows]),
                   gather_ids(inputs["label_ids"][rows]))
    loss.backward()
    return {"loss": loss.detach(), "text": text.grad, "image": image.grad,
            "params": [w_text.grad, w_image.grad, loss_fn.log_scale.grad]}


def _gather_worker(rank: int, port: int, out_dir: str) -> None:
    import torch.distributed as dist
    torch.set_num_threads(1)
    dist.init_process_group("gloo", init_method=f"tcp://127.0.0.1:{port}", rank=rank, world_size=WORLD)
    try:
        result = _step(_tower_inputs(), slice(rank * LOCAL, (rank + 1) * LOCAL), gather_global)
        for grad in result["params"]:  # what DDP does to parameter gradients: average over ranks
            dist.all_reduce(grad)
            grad /= WORLD
        torch.save(result, f"{out_dir}/rank{rank}.pt")
    finally:
        dist.destroy_process_group()


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def test_gather_global_gradient_equals_single_process(tmp_path):
    # Source: a real two-process gloo group (torch.distributed) against one process holding the
    # concatenated batch. Each rank's slice gradient is W x the single-process one (all_gather's
    # backward sums over ranks); DDP's average over ranks brings parameter gradients back to it.
    torch.multiprocessing.spawn(_gather_worker, args=(_free_port(), str(tmp_path)), nprocs=WORLD, join=True)
    inputs = _tower_inputs()
    single = _step(inputs, slice(None), lambda x: x)
    for rank in range(WORLD):
        got = torch.load(tmp_path / f"rank{rank}.pt")
        rows = slice(rank * LOCAL, (rank + 1) * LOCAL)
        torch.testing.assert_close(got["loss"], single["loss"], rtol=0, atol=1e-6)
        torch.testing.assert_close(got["text"] / WORLD, single["text"][rows], rtol=0, atol=1e-6)
        torch.testing.assert_close(got["image"] / WORLD, single["image"][rows], rtol=0, atol=1e-6)
        for mine, want in zip(got["params"], single["params"]):
            torch.testing.assert_close(mine, want, rtol=0, atol=1e-6)


def test_gather_is_identity_without_a_process_group():
    # Source: torch.distributed is not initialised in this process: nothing to gather.
    x = torch.randn(3, 2)
    assert gather_global(x) is x and gather_ids(None) is None
    ids = torch.arange(3)
    assert gather_ids(ids) is ids
