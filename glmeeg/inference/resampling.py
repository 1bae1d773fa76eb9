"""Which resamplings a permutation test draws: sign-flips of the subjects' maps or permutations
of the subjects (Freedman-Lane, with the nuisance columns' residuals), chosen from the group
design, enumerated when the full set is small and otherwise drawn in blocks of :data:`BLOCK`,
each from its own child of the test's seed, so that any batch or worker order gives the same
resamplings.

References
----------
.. [1] Freedman, D., & Lane, D. (1983). A nonstochastic interpretation of reported significance
   levels. Journal of Business & Economic Statistics, 1(4), 292-298.
.. [2] Winkler, A. M., Ridgway, G. R., Webster, M. A., Smith, S. M., & Nichols, T. E. (2014).
   Permutation inference for the general linear model. NeuroImage, 92, 381-397.
"""

from __future__ import annotations

import itertools
import math
from typing import Literal

import numpy as np
import scipy.linalg

from ..errors import ModelError

__all__ = ["BLOCK", "Scheme", "choose_resampling", "resamplings", "random_block"]

# Resamplings per child seed stream.
BLOCK = 100

Scheme = Literal["sign-flip", "permute"]


def _in_span(v: np.ndarray, A: np.ndarray) -> bool:
    if A.shape[1] == 0:
        return False
    coef, *_ = np.linalg.lstsq(A, v, rcond=None)
    return float(np.linalg.norm(v - A @ coef)) <= 1e-9 * float(np.linalg.norm(v))


def _nuisance(design: np.ndarray, contrast: np.ndarray) -> np.ndarray:
    return design @ scipy.linalg.null_space(contrast)


def choose_resampling(design: np.ndarray, contrast: np.ndarray, *, requested: str = "auto") -> Scheme:
    """The resampling scheme that suits a group design and contrast.

    Sign-flipping when the constant is not in the nuisance space (the test involves a mean),
    permutation of subjects when it is. ``requested`` other than ``"auto"`` is checked against
    that rule.

    Raises
    ------
    ModelError
        The requested scheme cannot test this contrast.
    """
    Z = _nuisance(design, contrast)
    ones = np.ones(design.shape[0])
    scheme: Scheme = "permute" if _in_span(ones, Z) else "sign-flip"
    if requested not in ("auto", scheme):
        if requested == "sign-flip":
            raise ModelError("resampling 'sign-flip' does not suit this contrast: it compares subjects "
                             "within a model that keeps a common mean, so subjects must be permuted "
                             "(use 'permute' or 'auto')")
        raise ModelError("resampling 'permute' cannot test this contrast: it involves the mean, which "
                         "permuting subjects leaves unchanged; use 'sign-flip' or 'auto'")
    return scheme


def resamplings(scheme: Scheme, n: int, *, permutations: int, seed: int) -> tuple[np.ndarray, bool]:
    """All resamplings of a test, one row each.

    Returns
    -------
    rows : numpy.ndarray
        ``(N, n)``: signs (int8, +1/-1) for sign-flipping, subject orders (int32) for
        permutation. When exhaustive, row 0 is the identity.
    exhaustive : bool
        True when every possible resampling is listed (``N`` = 2^n or n!).
    """
    total = 2 ** n if scheme == "sign-flip" else math.factorial(n)
    if total <= permutations:
        if scheme == "sign-flip":
            k = np.arange(total, dtype=np.int64)[:, None]
            bits = (k >> np.arange(n, dtype=np.int64)[None, :]) & 1
            return (1 - 2 * bits).astype(np.int8), True
        return np.array(list(itertools.permutations(range(n))), dtype=np.int32), True
    n_blocks = (permutations + BLOCK - 1) // BLOCK
    blocks = [random_block(scheme, n, seed=seed, block=j, count=min(BLOCK, permutations - j * BLOCK))
              for j in range(n_blocks)]
    return np.concatenate(blocks), False


def random_block(scheme: Scheme, n: int, *, seed: int, block: int, count: int = BLOCK) -> np.ndarray:
    """Resamplings ``block * BLOCK`` to ``block * BLOCK + count`` of a test's random draw.

    Block ``j`` comes from the ``j``-th child of ``SeedSequence(seed)`` (the child that
    ``SeedSequence(seed).spawn(...)[j]`` gives), so any worker can make its own blocks and the
    whole draw is the same however it is split.
    """
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(block,)))
    if scheme == "sign-flip":
        return (1 - 2 * rng.integers(0, 2, size=(count, n))).astype(np.int8)
    return np.argsort(rng.random((count, n)), axis=1, kind="stable").astype(np.int32)
