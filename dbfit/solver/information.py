"""What one scan gives the solver: the information matrix (dense, or by blocks for a categorical of many
levels), the score and the log-likelihood, all on the internal scale; numpy only.

The block form keeps [[A, B'], [B, D]] with D diagonal and solves through the Schur complement
S = A - B' D^-1 B (Golub and Van Loan 2013, Matrix Computations, 4th ed., section 3.2.5).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass
class PassResult:
    """What one scan returns: all p x p, p and scalar quantities, on the internal scale."""

    gram: np.ndarray
    score: np.ndarray
    loglik: float
    extreme: float  # weighted count of rows fitted (numerically) at 0 or 1
    misfit_extreme: float  # of those, rows fitted at the wrong extreme


@dataclass
class BlockInformation:
    """The information matrix [[dense, cross'], [cross, diag(diagonal)]] without forming it."""

    dense: np.ndarray  # k x k
    cross: np.ndarray  # m x k
    diagonal: np.ndarray  # m

    @property
    def shape(self) -> tuple[int, int]:
        size = self.dense.shape[0] + self.diagonal.size
        return size, size

    @property
    def size(self) -> int:
        return self.shape[0] * self.shape[1]

    def schur(self) -> np.ndarray:
        return self.dense - self.cross.T @ (self.cross / self.diagonal[:, None])

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        k = self.dense.shape[0]
        top, bottom = rhs[:k], rhs[k:]
        scaled = bottom / self.diagonal
        upper = np.linalg.solve(self.schur(), top - self.cross.T @ scaled) if k else np.zeros(0)
        return np.concatenate([upper, scaled - (self.cross @ upper) / self.diagonal])

    def inverse(self) -> np.ndarray:
        k = self.dense.shape[0]
        schur_inverse = np.linalg.inv(self.schur()) if k else np.zeros((0, 0))
        scaled_cross = self.cross / self.diagonal[:, None]  # D^-1 B
        corner = -schur_inverse @ scaled_cross.T
        block = np.diag(1.0 / self.diagonal) + scaled_cross @ schur_inverse @ scaled_cross.T
        return np.block([[schur_inverse, corner], [corner.T, block]])

    def diag(self) -> np.ndarray:
        return np.concatenate([np.diag(self.dense), self.diagonal])

    def keep_dense(self, keep: list[int]) -> "BlockInformation":
        return BlockInformation(self.dense[np.ix_(keep, keep)], self.cross[:, keep], self.diagonal)
