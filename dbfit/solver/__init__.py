"""Numerical solvers on p x p numbers only (numpy): Newton/IRLS steps and coordinate descent."""
