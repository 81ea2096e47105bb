"""Our invented scenarios: floor plans, exact ray casting, noisy ranges and drifting odometry."""
