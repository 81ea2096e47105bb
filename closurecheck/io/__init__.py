"""Files in and out: scan logs, robot recordings, candidate CSVs, pose-graph files, atomic writes.

Formats are those of docs/formats.md; every reader turns bad input into a
one-line :class:`closurecheck.errors.InputError` naming the file and line.
"""
