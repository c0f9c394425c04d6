"""What one scan gives the solver: the information matrix (dense, or by blocks for a categorical of many
levels), the score and the log-likelihood, all on the internal scale; numpy only.

Both forms of the information answer the same questions (solve, inverse, diagonal, restriction to some
parameters, the matrix the aliasing check reads, eigenvalues), so no caller asks which form it holds.
The dense form solves by Cholesky (Golub and Van Loan 2013, Matrix Computations, 4th ed., section 4.2).
The block form keeps [[A, B'], [B, D]] with D diagonal and solves through the Schur complement
S = A - B' D^-1 B (Golub and Van Loan 2013, section 3.2.5).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np


@dataclass
class DenseInformation:
    """The information matrix held in full (p x p)."""

    matrix: np.ndarray

    @property
    def shape(self) -> tuple[int, int]:
        rows, columns = self.matrix.shape
        return int(rows), int(columns)

    @property
    def size(self) -> int:
        return int(self.matrix.size)

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        """Solve by Cholesky; by least squares when the matrix is not positive definite."""
        try:
            factor = np.linalg.cholesky(self.matrix)
            return np.linalg.solve(factor.T, np.linalg.solve(factor, rhs))
        except np.linalg.LinAlgError:
            least_squares: np.ndarray = np.linalg.lstsq(self.matrix, rhs, rcond=None)[0]
            return least_squares

    def inverse(self) -> np.ndarray:
        """The inverse; the pseudo-inverse when the matrix is singular."""
        try:
            return np.linalg.inv(self.matrix)
        except np.linalg.LinAlgError:
            return np.linalg.pinv(self.matrix)

    def diag(self) -> np.ndarray:
        return np.diag(self.matrix)

    def keep(self, keep: list[int]) -> DenseInformation:
        """Restricted to the parameters ``keep`` (positions)."""
        return DenseInformation(self.matrix[np.ix_(keep, keep)])

    def aliasing_matrix(self) -> np.ndarray:
        """The matrix whose columns the aliasing check tests: the whole matrix."""
        return self.matrix

    def eigenvalues(self) -> np.ndarray:
        return np.linalg.eigvalsh(self.matrix) if self.matrix.size else np.array([1.0])

    def scaled(self, factor: float) -> DenseInformation:
        return DenseInformation(self.matrix * factor)

    def as_array(self) -> np.ndarray:
        return self.matrix


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
        complement: np.ndarray = self.dense - self.cross.T @ (self.cross / self.diagonal[:, None])
        return complement

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

    def keep(self, keep: list[int]) -> BlockInformation:
        """Restricted to the parameters ``keep``; only dense ones are dropped (the levels carry weight)."""
        dense = [k for k in keep if k < self.dense.shape[0]]
        return BlockInformation(self.dense[np.ix_(dense, dense)], self.cross[:, dense], self.diagonal)

    def aliasing_matrix(self) -> np.ndarray:
        """The Schur complement: a dense column the levels explain is aliased."""
        return self.schur()

    def eigenvalues(self) -> np.ndarray:
        schur, dense = np.linalg.eigvalsh(self.schur()), np.linalg.eigvalsh(self.dense)
        return np.concatenate([schur, self.diagonal, dense])

    def scaled(self, factor: float) -> BlockInformation:
        return BlockInformation(self.dense * factor, self.cross * factor, self.diagonal * factor)

    def as_array(self) -> np.ndarray:
        return np.block([[self.dense, self.cross.T], [self.cross, np.diag(self.diagonal)]])


Information = DenseInformation | BlockInformation


@dataclass
class PassResult:
    """What one scan returns: all p x p, p and scalar quantities, on the internal scale.

    A plain array given as ``gram`` is held as :class:`DenseInformation`.
    """

    gram: Information
    score: np.ndarray
    loglik: float
    extreme: float  # weighted count of rows fitted (numerically) at 0 or 1
    misfit_extreme: float  # of those, rows fitted at the wrong extreme

    def __post_init__(self) -> None:
        if isinstance(self.gram, np.ndarray):
            self.gram = DenseInformation(self.gram)

    def restricted(self, keep: list[int]) -> PassResult:
        """This result over the parameters ``keep`` (positions) only."""
        return dataclasses.replace(self, gram=self.gram.keep(keep), score=self.score[keep])
