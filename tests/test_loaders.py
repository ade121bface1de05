"""Loader handling: workers and prefetching, drop_last, batch sizes, refused inputs."""

from __future__ import annotations

import pytest
import torch
import torch.nn.functional as F
from torch.utils.data import DataLoader, Dataset, IterableDataset

from sgdstab import LockstepError, StabilityTracker

from ._toy import flat, loader, mlp, pebbles, train


def _tracked(data, batches, epochs=1, **options):
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.2, momentum=0.9)
    torch.manual_seed(7)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=2,
                               **options)
    readings = train(model, opt, batches, epochs=epochs, tracker=tracker)
    return model, tracker, readings


def _plain(batches, epochs=1):
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.2, momentum=0.9)
    torch.manual_seed(7)
    train(model, opt, batches, epochs=epochs)
    return model


def test_two_workers_prefetching_keeps_indices_in_order_and_the_run_unchanged():
    data = pebbles(count=64)
    make = lambda: loader(data, batch_size=8, seed=2, num_workers=2)  # noqa: E731
    tracked, tracker, readings = _tracked(data, make(), epochs=2)
    assert torch.equal(flat(tracked), flat(_plain(make(), epochs=2)))
    assert readings[0].audit_divergence == 0.0
    # recorded indices are exactly the rows the workers delivered, batch by batch
    model = mlp()
    opt = torch.optim.SGD(model.parameters(), lr=0.1)
    tracker = StabilityTracker(model, opt, loss_fn=F.cross_entropy, train_set=data, shadows=1)
    seen = []
    for x, y in tracker.batches(make()):
        seen.append(x)
        opt.zero_grad()
        F.cross_entropy(model(x), y).backward()
        opt.step()
    recorded = tracker.history.flat_indices()
    assert sorted(recorded.tolist()) == list(range(len(data)))
    assert torch.equal(torch.cat(seen), data.tensors[0][torch.as_tensor(recorded.astype("int64"))])


@pytest.mark.parametrize("batch_size, drop_last", [(1, False), (7, True), (7, False), (200, False)])
def test_batch_sizes_and_drop_last(batch_size, drop_last):
    data = pebbles(count=40)
    batches = loader(data, batch_size=batch_size, drop_last=drop_last, shuffle=False)
    tracked, tracker, readings = _tracked(data, batches)
    assert torch.equal(flat(tracked), flat(_plain(batches)))
    expected_steps = len(data) // batch_size if drop_last else -(-len(data) // batch_size)
    assert tracker.steps == expected_steps
    sizes = tracker.history.batch_sizes()
    assert sizes.sum() == (expected_steps * batch_size if drop_last else len(data))


class NoLength(Dataset):
    def __getitem__(self, i):
        return torch.zeros(2), torch.tensor(0)


class Stream(IterableDataset):
    def __iter__(self):
        yield torch.zeros(2), torch.tensor(0)


def _make(train_set):
    model = mlp(features=2)
    return StabilityTracker(model, torch.optim.SGD(model.parameters(), lr=0.1),
                            loss_fn=F.cross_entropy, train_set=train_set, shadows=1)


def test_refused_datasets():
    with pytest.raises(LockstepError, match="IterableDataset"):
        _make(Stream())
    with pytest.raises(LockstepError, match="len"):
        _make(NoLength())


def test_refused_loaders():
    data = pebbles(count=20, features=2)
    tracker = _make(data)
    with pytest.raises(LockstepError, match="does not draw from train_set"):
        next(iter(tracker.batches(DataLoader(pebbles(count=20, features=2), batch_size=4))))
    with pytest.raises(LockstepError, match="does not batch"):
        next(iter(tracker.batches(DataLoader(data, batch_size=None))))
    with pytest.raises(LockstepError, match="DataLoader"):
        next(iter(tracker.batches([data[0]])))
