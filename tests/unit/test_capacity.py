"""Table sizes are checked against available memory before allocation (CapacityError)."""

from __future__ import annotations

import numpy as np
import pytest

import tdkit
from tdkit import CapacityError
from tdkit.tables import available_memory, require_capacity


@pytest.mark.parametrize(
    "build",
    [
        lambda: tdkit.QLearning(10**12, 4),
        lambda: tdkit.DoubleQLearning(10**12, 4),
        lambda: tdkit.SarsaLambda(10**12, 4),
        lambda: tdkit.TD0(10**13, 1, policy=lambda obs: 0),
    ],
    ids=["QLearning", "DoubleQLearning", "SarsaLambda", "TD0"],
)
def test_an_impossible_table_is_a_capacity_error_giving_the_bytes(build):
    # 10**12 x 4 float64 values and int64 counts: 6.4e13 bytes, more than any machine
    # this runs on (numpy would otherwise raise its own MemoryError, or swap).
    with pytest.raises(CapacityError, match=r"needs \d+ bytes") as info:
        build()
    assert "available" in str(info.value)


def test_the_limit_is_the_memory_reported_available():
    available = available_memory()
    assert available is not None and available > 0
    entries = available // 16 + 1  # one entry more than fits at 16 bytes each
    with pytest.raises(CapacityError, match=str(entries * 16)):
        require_capacity("QLearning", (entries, 1), 16)
    require_capacity("QLearning", (1000, 4), 16)  # a small table passes


def test_the_row_cache_slot_of_each_state_is_counted():
    # A learner keeps one 8-byte slot per state for its row cache beside the
    # 16 bytes an entry of values and counts: a table that fits without the
    # slots but not with them is refused before anything is allocated.
    available = available_memory()
    assert available is not None
    rows = available // 24 + 1  # 16 + 8 bytes per one-column row: just too many
    require_capacity("TD0", (rows, 1), 16)  # fits without the slots
    with pytest.raises(CapacityError, match=str(rows * 24)):
        require_capacity("TD0", (rows, 1), 16, bytes_per_row=8)


def test_capacity_errors_are_value_errors_and_tdkit_errors():
    with pytest.raises(ValueError):
        tdkit.QLearning(10**12, 4)
    with pytest.raises(tdkit.TdkitError):
        tdkit.ExpectedSarsa(4, 10**12)
    assert tdkit.QLearning(16, 4).table.shape == (16, 4)  # ordinary sizes untouched
    assert np.all(tdkit.QLearning(16, 4).visits == 0)
