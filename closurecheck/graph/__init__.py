"""The pose graph's least squares: sparse Levenberg-Marquardt with robust kernels, GNC, and selected blocks of the inverse."""
