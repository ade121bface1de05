"""Row substitution, row selection and RNG preservation in the lockstep engine."""

from __future__ import annotations

import random
from collections import namedtuple

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from torch.utils.data._utils.collate import default_collate

from sgdstab.shadows.lockstep import (
    LockstepError,
    StepGroup,
    preserved_rng,
    select_rows,
    squared_distance,
    substitute_rows,
)

Pair = namedtuple("Pair", ["image", "label"])


def test_substitution_in_nested_dict_and_tuple_batches_copies_only_changed_leaves():
    examples = [{"x": torch.full((3,), float(i)), "meta": (torch.tensor(i), f"id{i}")}
                for i in range(4)]
    batch = default_collate(examples)
    row = default_collate([{"x": torch.full((3,), 9.0), "meta": (torch.tensor(9), "new")}])
    out = substitute_rows(batch, row, [2], rows=4)
    assert torch.equal(out["x"][2], torch.full((3,), 9.0))
    assert list(out["meta"][1]) == ["id0", "id1", "new", "id3"]
    assert int(out["meta"][0][2]) == 9
    assert torch.equal(batch["x"][2], torch.full((3,), 2.0))   # the main batch is untouched
    assert batch["meta"][1][2] == "id2"


def test_namedtuple_batches_keep_their_type():
    batch = Pair(torch.zeros(3, 2), torch.tensor([0, 1, 0]))
    out = substitute_rows(batch, Pair(torch.ones(1, 2), torch.tensor([1])), [0, 2], rows=3)
    assert isinstance(out, Pair)
    assert out.label.tolist() == [1, 1, 1]
    assert out.image[1].sum() == 0 and out.image[0].sum() == 2


@pytest.mark.parametrize("row, message", [
    ((torch.ones(1, 3), torch.tensor([1])), "does not fit"),
    ((torch.ones(1, 2),), "does not match"),
    ({"a": torch.ones(1, 2)}, "holds a tensor|does not match"),
])
def test_mismatched_replacements_are_refused(row, message):
    batch = (torch.zeros(4, 2), torch.zeros(4, dtype=torch.long))
    with pytest.raises(LockstepError, match=message):
        substitute_rows(batch, row, [1], rows=4)


def test_a_tensor_without_a_row_dimension_is_refused():
    with pytest.raises(LockstepError, match="no row dimension"):
        substitute_rows((torch.zeros(3, 2), torch.tensor(5.0)),
                        (torch.ones(1, 2), torch.tensor(5.0)), [0], rows=3)


def test_select_rows_matches_indexing():
    batch = {"x": torch.arange(10).reshape(5, 2), "names": list("abcde"), "k": 3}
    part = select_rows(batch, [1, 3], 5)
    assert part["x"].tolist() == [[2, 3], [6, 7]] and part["names"] == ["b", "d"]
    assert part["k"] == 3


def test_preserved_rng_restores_all_three_generators():
    torch.manual_seed(1)
    random.seed(1)
    np.random.seed(1)
    expected = (torch.rand(1), random.random(), np.random.rand())
    torch.manual_seed(1)
    random.seed(1)
    np.random.seed(1)
    with preserved_rng():
        torch.rand(5)
        random.random()
        np.random.rand(3)
    assert (torch.rand(1), random.random(), np.random.rand()) == expected


# A property-based test over random nested batch structures: substituting row r by the
# replacement and reading the rows back gives the replacement at r and the original elsewhere.
leaf_shapes = st.lists(st.integers(1, 3), min_size=0, max_size=2)


def _structure(depth: int):
    leaf = st.one_of(leaf_shapes.map(lambda shape: ("tensor", tuple(shape))),
                     st.just(("string", None)))
    if depth == 0:
        return leaf
    inner = _structure(depth - 1)
    return st.one_of(leaf,
                     st.lists(inner, min_size=1, max_size=3).map(lambda xs: ("tuple", xs)),
                     st.dictionaries(st.sampled_from("abc"), inner, min_size=1, max_size=3)
                     .map(lambda d: ("dict", d)))


def _example(spec, seed: int):
    kind, content = spec
    if kind == "tensor":
        g = torch.Generator().manual_seed(seed)
        return torch.randn(*content, generator=g) if content else torch.randn((), generator=g)
    if kind == "string":
        return f"s{seed}"
    if kind == "tuple":
        return tuple(_example(c, seed * 7 + i) for i, c in enumerate(content))
    return {k: _example(c, seed * 11 + i) for i, (k, c) in enumerate(sorted(content.items()))}


def _same(a, b) -> bool:
    if isinstance(a, torch.Tensor):
        return torch.equal(a, b)
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, (list, tuple)):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b))
    return a == b


@settings(max_examples=60, deadline=None)
@given(spec=_structure(2), rows=st.integers(1, 5), data=st.data())
def test_substitution_property_over_random_nested_batches(spec, rows, data):
    examples = [_example(spec, seed) for seed in range(rows)]
    replacement = _example(spec, 999)
    position = data.draw(st.integers(0, rows - 1))
    batch = default_collate(examples)
    out = substitute_rows(batch, default_collate([replacement]), [position], rows=rows)
    for r in range(rows):
        expected = replacement if r == position else examples[r]
        got = select_rows(out, [r], rows)
        assert _same(got, default_collate([expected]))
    assert _same(batch, default_collate(examples))   # the original batch is never modified


def test_host_rng_guard_detects_draws_and_restores_the_states():
    from sgdstab.shadows.lockstep import HostRngGuard

    guard = HostRngGuard()
    states = guard.save(first_epoch=True)
    expected = (random.random(), np.random.rand())
    random.setstate(states[0])
    np.random.set_state(states[1])
    states = guard.save(first_epoch=True)
    assert guard.restore(states) is False           # nothing drawn: nothing detected
    assert guard.save(first_epoch=False, step=1) is None   # after the first epoch: not guarded,
    assert guard.save(first_epoch=False, step=64) is not None   # except every 32nd step
    states = guard.save(first_epoch=True)
    np.random.rand()
    assert guard.restore(states) is True and guard.used
    assert guard.save(first_epoch=False) is not None  # once detected, always guarded
    assert (random.random(), np.random.rand()) == expected
    assert HostRngGuard(False).save(first_epoch=True) is None


def test_squared_distance_matches_numpy_in_float64_across_chunks():
    # Reference: numpy's float64 arithmetic on the same values (a general-purpose library).
    g = torch.Generator().manual_seed(3)
    a = torch.randn(300, 70, generator=g)
    b = a + 1e-4 * torch.randn(300, 70, generator=g)
    expected = float(((a.numpy().astype(np.float64) - b.numpy().astype(np.float64)) ** 2).sum())
    for chunk in (7, 1000, 1 << 16):
        assert squared_distance(a, b, chunk=chunk) == pytest.approx(expected, rel=1e-12)
    assert squared_distance(a, chunk=999) == pytest.approx(
        float((a.numpy().astype(np.float64) ** 2).sum()), rel=1e-12)
    assert squared_distance(a, a.clone()) == 0.0     # the null swap stays exactly zero


def test_a_step_group_finds_an_examples_positions_batch_by_batch():
    group = StepGroup([None], [np.array([4, 9, 4, 1])], [])
    assert group.positions(0, 4) == [0, 2]
    assert group.positions(0, 7) == []
    group.batches.append(None)   # a second batch before the step (gradient accumulation)
    group.indices.append(np.array([7, 3]))
    assert group.positions(1, 7) == [0]
    assert group.positions(1, 4) == []
    assert group.positions(0, 7) == []
