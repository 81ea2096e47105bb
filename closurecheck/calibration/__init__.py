"""The odometry measured against its own scans: systematic errors, noise model and slips, before any loop closure."""
