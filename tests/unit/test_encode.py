"""Decoding stored vectors and actions: the inverse of rows_to_bytes, with None for absent."""

import numpy as np
from numpy.testing import assert_array_equal

from expertloop.shared.encode import nullable_rows, rows_to_bytes, stored_actions


def test_nullable_rows_round_trips_and_fills_the_gaps():
    values = np.array([[0.1, -2.0], [3.5, 1e-7]], dtype=np.float32)
    first, second = rows_to_bytes(values)
    rows, present = nullable_rows([first, None, second], (2,), fill=np.nan, dtype=np.float64)
    assert_array_equal(present, [True, False, True])
    assert_array_equal(rows[[0, 2]], values.astype(np.float64))  # exact float32 values
    assert np.isnan(rows[1]).all()
    zeros, none_present = nullable_rows([None, None], (2, 3), fill=0.0, dtype=np.float32)
    assert zeros.shape == (2, 2, 3) and not zeros.any() and not none_present.any()


def test_stored_actions_for_both_action_spaces():
    assert_array_equal(stored_actions([2, None, 0], [None] * 3, discrete=True, width=3), [2, -1, 0])
    vector = rows_to_bytes(np.array([[0.5, -1.0]], dtype=np.float32))[0]
    found = stored_actions([None, None], [vector, None], discrete=False, width=2)
    assert_array_equal(found[0], [0.5, -1.0])
    assert np.isnan(found[1]).all()
