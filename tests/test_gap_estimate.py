"""The on-average replace-one gap estimate against the gap measured on a large fresh sample.

Source of the identity: Shalev-Shwartz, Shamir, Srebro & Sridharan 2010 (also Shalev-Shwartz &
Ben-David, "Understanding Machine Learning", ch. 13; statement as in SCIENCE.md §1): the expected
generalization gap equals E[f(A(S^(i)); z_i) - f(A(S); z_i)] when z' is a fresh draw. The check
value is the demo scenario's gap measured directly: loss on 40,000 freshly generated tiles minus
the loss on the whole training set. One training set gives one realisation of the gap, so the
comparison allows the estimator's standard error and a small slack for that realisation.
The generated data and the large fresh sample make this a statistical check, not a closed form.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch.utils.data import DataLoader, TensorDataset

from sgdstab import StabilityTracker
from sgdstab.cli.demo import GlazeGrader, glaze_tiles


def _loss(model, dataset):
    with torch.no_grad():
        return float(F.cross_entropy(model(dataset.tensors[0]), dataset.tensors[1]))


def test_replace_one_estimate_agrees_with_the_gap_on_fresh_data():
    torch.manual_seed(0)
    pool = glaze_tiles(1600, seed=11)
    train_set = TensorDataset(*(t[:1200] for t in pool.tensors))
    held_out = TensorDataset(*(t[1200:] for t in pool.tensors))
    fresh = glaze_tiles(40000, seed=99)
    model = GlazeGrader()
    optimizer = torch.optim.SGD(model.parameters(), lr=0.3)
    tracker = StabilityTracker(model, optimizer, loss_fn=F.cross_entropy, train_set=train_set,
                               shadows=12, replacements=held_out, seed=4, probe_size=64)
    loader = DataLoader(train_set, batch_size=32, shuffle=True,
                        generator=torch.Generator().manual_seed(0))
    for _ in range(4):
        for x, y in tracker.batches(loader):
            optimizer.zero_grad()
            F.cross_entropy(model(x), y).backward()
            optimizer.step()
        reading = tracker.finish_epoch()
    measured = _loss(model, fresh) - _loss(model, train_set)
    # observed here: estimate 0.0060 +/- 0.0014, measured 0.0104. The exact formula is checked in
    # test_tracker.py; this is the statistical check that it estimates the right quantity: clearly
    # positive, and of the measured gap's size (a sign error, a missing shadow term or a factor
    # of n would fall outside).
    estimate, stderr = reading.gap_estimate, reading.gap_stderr
    assert measured > 0 and estimate > 2 * stderr
    assert measured / 4 <= estimate <= 4 * measured
    assert abs(estimate - measured) <= 4 * stderr + 0.003
