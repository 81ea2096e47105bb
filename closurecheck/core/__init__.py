"""Mathematics every stage shares.

SE(2) algebra, robust kernels, the odometry model, chi-square bounds, and
the options toolbox.
"""
