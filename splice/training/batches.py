"""Data order and batch randomness as pure functions of ``(seed, epoch, step)``.

Nothing here keeps hidden state between batches: the permutation of epoch
``e`` is drawn from a generator seeded with ``mix(seed, "order", e)``, and the
augmentation of batch ``b`` of epoch ``e`` on rank ``r`` from
``mix(seed, "augment", e, b, r)``. A run resumed at ``(e, b)`` therefore sees
exactly the batches an uninterrupted run would.

Sharding follows ``torch.utils.data.DistributedSampler``: the permutation is
padded by wrapping around to a multiple of the world size and rank ``r`` takes
every ``world``-th index starting at ``r``, so every rank runs the same number
of steps.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterator, Sequence

import torch
from torch import Tensor

from ..errors import SpliceError

__all__ = ["mix", "generator", "epoch_order", "shard", "index_batches", "fetch", "iterate", "in_memory"]


def mix(*parts: object) -> int:
    """A 63-bit seed derived from ``parts`` (ints and strings), stable across runs and machines."""
    h = hashlib.blake2b(repr(parts).encode(), digest_size=8).digest()
    return int.from_bytes(h, "little") & ((1 << 63) - 1)


def generator(*parts: object) -> torch.Generator:
    """A CPU generator seeded with :func:`mix` of ``parts``."""
    return torch.Generator().manual_seed(mix(*parts))


def epoch_order(seed: int, epoch: int, n: int, *, tag: str = "order") -> Tensor:
    """The permutation of ``range(n)`` used in ``epoch``."""
    return torch.randperm(n, generator=generator(seed, tag, epoch))


def shard(order: Tensor, rank: int, world: int) -> Tensor:
    """Rank ``rank``'s share of ``order`` (wrap-around padding, like ``DistributedSampler``)."""
    if world <= 1:
        return order
    n = order.numel()
    total = -(-n // world) * world
    if total > n:
        reps = -(-total // n)
        order = order.repeat(reps)[:total]
    return order[rank:total:world]


def index_batches(indices: Tensor, batch_size: int) -> list[Tensor]:
    return list(torch.split(indices, batch_size))


def in_memory(dataset) -> bool:
    """True when the whole split is one tensor (``splice.data.ImageSet``)."""
    return isinstance(getattr(dataset, "images", None), Tensor)


def fetch(dataset, idx: Tensor) -> tuple[Tensor, Tensor]:
    """Images and labels of ``idx`` from an in-memory or a lazy (map-style) dataset."""
    if in_memory(dataset):
        return dataset.images[idx], dataset.labels[idx]
    items = [dataset[int(i)] for i in idx]
    images = torch.stack([it[0] for it in items])
    labels = torch.as_tensor([int(it[1]) for it in items], dtype=torch.long)
    return images, labels


class _Guarded:
    """A lazy dataset whose items hand back a splice error instead of raising it.

    A DataLoader worker would wrap the error's one line in its own traceback
    (and a run record would keep only "Caught DataError in DataLoader worker
    process 0."); :func:`iterate` raises it again in the main process, as it is.
    """

    def __init__(self, dataset):
        self.dataset = dataset

    def __len__(self) -> int:
        return len(self.dataset)

    def __getitem__(self, i):
        try:
            return self.dataset[i]
        except SpliceError as exc:
            return exc


def _collate(items):
    failed = next((it for it in items if isinstance(it, SpliceError)), None)
    if failed is not None:
        return failed
    images = torch.stack([it[0] for it in items])
    labels = torch.as_tensor([int(it[1]) for it in items], dtype=torch.long)
    return images, labels


def iterate(dataset, batches: Sequence[Tensor], *, workers: int = 0) -> Iterator[tuple[Tensor, Tensor]]:
    """Yield ``(images, labels)`` for each index batch, in order.

    In-memory splits are sliced directly. Lazy folders are read through a
    ``DataLoader`` with ``workers`` processes and our own batch order (the
    order, not the loader, decides what comes next, so resuming stays exact).
    """
    if in_memory(dataset) or workers <= 0:
        for idx in batches:
            yield fetch(dataset, idx)
        return
    from torch.utils.data import DataLoader

    loader = DataLoader(_Guarded(dataset), batch_sampler=[b.tolist() for b in batches], num_workers=workers,
                        collate_fn=_collate, persistent_workers=False)
    for batch in loader:
        if isinstance(batch, SpliceError):
            raise batch  # the worker's error, as one line
        yield batch
