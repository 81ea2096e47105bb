"""Scan registration: point-to-line ICP, the correlative coarse stage, Censi's covariance, and batches of pairs."""
