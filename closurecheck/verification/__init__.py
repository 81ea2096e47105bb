"""Deciding which registered candidates are loop closures: gates, pairwise consistency, the map gate, the verdict trail."""
