"""Train/validation/test masks: the split protocol used when a graph file gives none."""
from __future__ import annotations

import numpy as np

MASK_KEYS = ("train_mask", "val_mask", "test_mask")


def make_masks(labels: np.ndarray, seed: int, per_class: int = 20, val: int = 500,
                test: int = 1000) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(train, val, test) bool masks, deterministic from `seed`.

    The protocol of Kipf & Welling (ICLR 2017): `per_class` labelled vertices of each class for
    training, then `val` and `test` vertices drawn from the other labelled vertices. For small
    data: a class with fewer than 2 * per_class vertices gives half of them (at least one) to
    training, and val/test shrink in proportion when too few labelled vertices remain. The
    three masks are disjoint and hold only labelled vertices (label >= 0).
    """
    labels = np.asarray(labels, dtype=np.int64)
    n = labels.shape[0]
    rng = np.random.default_rng(seed)
    labelled = np.flatnonzero(labels >= 0)
    order = labelled[rng.permutation(labelled.shape[0])]
    order = order[np.argsort(labels[order], kind="stable")]   # random order within each class
    cls = labels[order]
    counts = np.bincount(cls) if cls.shape[0] else np.zeros(0, np.int64)
    class_start = np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(np.int64)
    rank = np.arange(order.shape[0]) - class_start[cls]
    quota = np.minimum(per_class, np.maximum(1, counts // 2))
    in_train = rank < quota[cls]
    train = np.zeros(n, dtype=bool)
    train[order[in_train]] = True
    rest = order[~in_train]
    rest = rest[rng.permutation(rest.shape[0])]
    if val + test > rest.shape[0]:
        n_val = (rest.shape[0] * val) // max(val + test, 1)
        n_test = rest.shape[0] - n_val
    else:
        n_val, n_test = val, test
    val_mask = np.zeros(n, dtype=bool)
    test_mask = np.zeros(n, dtype=bool)
    val_mask[rest[:n_val]] = True
    test_mask[rest[n_val:n_val + n_test]] = True
    return train, val_mask, test_mask
