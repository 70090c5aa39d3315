"""Engines of the permutation test: exact enumeration, Monte Carlo (with compiled kernels), normal."""
