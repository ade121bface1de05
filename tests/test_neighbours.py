"""Choosing neighbouring datasets."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch.utils.data._utils.collate import default_collate

from sgdstab.shadows.lockstep import LockstepError, NeighbourSpec, Shadow
from sgdstab.shadows.neighbours import attach_rows, explicit_neighbours, seeded_neighbours


def _fetch(dataset, j):
    return dataset[int(j)]


def test_seeded_choices_are_reproducible_distinct_and_labelled():
    train, holdout = list(range(100)), [f"h{j}" for j in range(10)]
    first = seeded_neighbours(5, 100, np.random.default_rng(3), _fetch, train, holdout)
    again = seeded_neighbours(5, 100, np.random.default_rng(3), _fetch, train, holdout)
    assert [s.index for s in first] == [s.index for s in again]
    assert len({s.index for s in first}) == 5
    assert all(s.origin == "holdout" and s.replacement == f"h{s.source_index}" for s in first)


def test_without_a_holdout_the_replacements_are_other_training_examples():
    specs = seeded_neighbours(4, 10, np.random.default_rng(0), _fetch, list(range(10)), None)
    for spec in specs:
        assert spec.origin == "train" and spec.source_index != spec.index
        assert spec.source_index not in {s.index for s in specs}


def test_explicit_swaps_are_checked():
    assert [s.index for s in explicit_neighbours([(2, "a"), (0, "b")], 3)] == [2, 0]
    with pytest.raises(IndexError):
        explicit_neighbours([(3, "a")], 3)
    with pytest.raises(ValueError):
        explicit_neighbours([(1, "a"), (1, "b")], 3)


def test_attached_rows_are_one_row_batches_and_a_mismatched_replacement_is_refused():
    train = [(torch.full((3,), float(i)), torch.tensor(i % 2)) for i in range(6)]
    good = Shadow(NeighbourSpec(2, train[5], "train", 5), None, None, None, "shadow_0")
    attach_rows([good], train, default_collate)
    features, label = good.row
    assert torch.equal(features, torch.full((1, 3), 5.0)) and torch.equal(label, torch.tensor([1]))
    bad = Shadow(NeighbourSpec(4, (torch.zeros(3),), "explicit"), None, None, None, "shadow_1")
    with pytest.raises(LockstepError, match="shadow_1: the replacement for training example 4"):
        attach_rows([good, bad], train, default_collate)
