"""Label extents against scipy.ndimage.find_objects (scipy 1.17.1, the version installed
when this was written), the reference for the bounds of each label."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.ndimage

from sillmark.errors import InvalidParameter
from sillmark.products.extents import label_extents


@pytest.mark.parametrize("dtype", [np.int32, np.int64, np.uint16])
def test_extents_match_find_objects_with_missing_and_out_of_range_labels(dtype):
    rng = np.random.default_rng(5)
    labels = rng.integers(0, 40, size=(37, 53)).astype(dtype)
    labels[labels == 7] = 0          # a label with no cell
    labels[3, 4] = 45                # above n: ignored, as find_objects with max_label ignores it
    n = 42                           # 40 and 41 never occur either
    found = scipy.ndimage.find_objects(labels, max_label=n)
    e = label_extents(labels, n)
    assert len(e) == n
    for k, sl in enumerate(found):
        if sl is None:
            assert e.window(k) == (slice(0, 0), slice(0, 0)), k
        else:
            assert e.window(k) == sl, k


def test_one_block_by_hand_and_a_memory_map(tmp_path):
    # Label 1 spans rows 1-2, cols 2-4; label 2 is the single cell (0, 0).
    z = np.zeros((4, 6), np.int32)
    z[1, 2:5] = 1
    z[2, 3] = 1
    z[0, 0] = 2
    path = tmp_path / "ids.npy"
    np.save(path, z)
    e = label_extents(np.load(path, mmap_mode="r"), 2)
    assert e.window(0) == (slice(1, 3), slice(2, 5))
    assert e.window(1) == (slice(0, 1), slice(0, 1))


def test_bad_input_is_refused():
    with pytest.raises(InvalidParameter, match="2-D integer"):
        label_extents(np.zeros((3, 3), np.float32), 1)
    with pytest.raises(InvalidParameter, match="0 or more"):
        label_extents(np.zeros((3, 3), np.int32), -1)
    assert len(label_extents(np.zeros((3, 3), np.int32), 0)) == 0
