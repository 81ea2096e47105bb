"""Deciding which registered candidates are loop closures.

Gates, pairwise consistency, the map gate, heading-drift calibration, the
reason codes and the verdict trail.
"""
