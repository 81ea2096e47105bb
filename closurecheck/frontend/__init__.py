"""Loop-closure proposals: keyframes, scan descriptors and candidate pairs."""
