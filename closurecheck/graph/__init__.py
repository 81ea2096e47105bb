"""The pose graph's least squares.

Sparse Levenberg-Marquardt with robust kernels and GNC, and selected blocks
of the inverse normal matrix.
"""
