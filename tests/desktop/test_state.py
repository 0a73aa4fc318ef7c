"""The shared state: clamping, echo-free setters, marks and level."""

import numpy as np
import pytest

from modescope.app.desktop.state import AppState, initial_rank
from modescope.core.decomposition import Decomposition
from modescope.core.review.rank import energy_rank


def make(n=20, k=8, seed=0):
    # reference factors from LAPACK (numpy.linalg.svd)
    rng = np.random.default_rng(seed)
    x = rng.random((30, n)) * np.linspace(3, 0.1, 30)[:, None]
    mean = x.mean(axis=1)
    c = x - mean[:, None]
    u, s, _ = np.linalg.svd(c, full_matrices=False)
    w = u[:, :k].T @ c
    return Decomposition(mean=mean.astype(np.float32), basis=u[:, :k].astype(np.float32),
                         singular_values=s[:k], weights=w, total_energy=float(np.sum(c ** 2)),
                         image_shape=(5, 6, 1), residual=np.sum((c - u[:, :k] @ w) ** 2, 0))


def test_initial_rank_is_95_percent_energy_rank(qtbot):
    state = AppState()
    d = make()
    with qtbot.waitSignal(state.rankChanged):
        state.set_decomposition(d)
    found = energy_rank(d, 0.95)
    assert state.rank == initial_rank(d) == (d.rank if found.rank is None
                                             else max(1, min(d.rank, found.rank)))
    assert state.selected == 0
    state.set_rank(99)
    assert state.rank == d.rank                     # clamped to k
    state.set_decomposition(d.truncated(3))
    assert state.rank == 3


def test_setters_emit_only_on_change(qtbot):
    state = AppState()
    state.set_decomposition(make())
    seen = []
    state.selectedChanged.connect(seen.append)
    state.set_selected(4)
    state.set_selected(4)
    assert seen == [4]
    with pytest.raises(ValueError, match="image index must be in -1..19"):
        state.set_selected(20)


def test_marks_and_level(qtbot):
    state = AppState()
    d = make()
    state.set_decomposition(d)
    changed = []
    state.marksChanged.connect(changed.append)
    state.set_marks([3, 5], 2)
    state.set_marks([3], 2)                          # no change, no signal
    assert changed == [(3, 5)]
    np.testing.assert_array_equal(np.nonzero(state.decomposition.marks == 2)[0], [3, 5])
    assert d.marks.sum() == 0                        # the old object is not modified
    with pytest.raises(ValueError, match="mark must be 0"):
        state.set_marks([1], 7)
    levels = []
    state.levelChanged.connect(levels.append)
    state.set_level(0.95)
    assert state.level == 0.95 and levels == [0.95]
    with pytest.raises(ValueError, match="level must be in"):
        state.set_level(1.0)


def test_final_result_rechooses_rank_unless_the_user_moved_it(qtbot):
    state = AppState()
    d = make()
    partial = d.replace(exact=False, residual=None)
    state.set_decomposition(partial)
    state._set_rank_raw(d.rank)          # as if the first snapshot had given k
    state.set_decomposition(d)            # final result: back to the 95% rank
    assert state.rank == initial_rank(d)
    state.set_rank(2)                     # the user moves the slider
    state.set_decomposition(d)
    assert state.rank == 2


def test_select_from_view_one_rule_for_every_view(qtbot):
    s = AppState()
    s.set_decomposition(make())
    s.select_from_view([4, 2, 7], 7)           # current inside the selection: it is selected
    assert s.selected == 7 and s.selection_set == (2, 4, 7)
    s.select_from_view([4, 2], 9)              # current outside: the first selected image
    assert s.selected == 2 and s.selection_set == (2, 4)
    s.select_from_view([5], -1)                # one image: no selection set
    assert s.selected == 5 and s.selection_set == ()
    s.select_from_view([], 3)                  # nothing selected, a current row: that one
    assert s.selected == 3 and s.selection_set == ()
