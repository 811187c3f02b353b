"""The report's heat maps in blocks of values: the same contacts, summed per block (checked by hand-built
symmetric matrices with numpy)."""

import numpy as np

from aggpub.audit.report import _block_matrix


def _pairs(k):
    ia, ib = np.triu_indices(k)
    return ia, ib


def test_block_of_one_is_the_symmetric_matrix():
    k = 7
    ia, ib = _pairs(k)
    data = np.arange(1, len(ia) + 1, dtype=float)
    m, block = _block_matrix([str(i) for i in range(k)], ia, ib, data, side=10)
    full = np.zeros((k, k))
    full[ia, ib] = data
    full[ib, ia] = data
    assert block == 1
    np.testing.assert_array_equal(m, full)


def test_blocks_hold_the_contacts_between_value_groups():
    k, side = 23, 5  # blocks of ceil(23 / 5) = 5 values, 5 blocks (the last of 3 values)
    ia, ib = _pairs(k)
    rng = np.random.default_rng(3)
    data = rng.integers(0, 50, len(ia)).astype(float)
    m, block = _block_matrix([str(i) for i in range(k)], ia, ib, data, side=side)
    assert block == 5 and m.shape == (5, 5)
    np.testing.assert_array_equal(m, m.T)
    # contacts within block A (the diagonal) + between blocks (upper triangle) = every contact once
    assert np.triu(m).sum() == data.sum()
    ga, gb = ia // 5, ib // 5
    for x in range(5):
        for y in range(x, 5):
            sel = ((ga == x) & (gb == y)) | ((ga == y) & (gb == x))
            assert m[x, y] == data[sel].sum()
