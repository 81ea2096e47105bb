"""The pose graph's least squares.

Sparse Levenberg-Marquardt with robust kernels and GNC, a heading-first
linear start for large graphs, and selected blocks of the inverse normal
matrix.
"""
