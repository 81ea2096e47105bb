"""Mathematics every stage shares: SE(2) algebra, robust kernels, the odometry model, chi-square gates, option checking."""
