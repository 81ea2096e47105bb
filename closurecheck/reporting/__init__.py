"""What a run gives back to people: output files, the HTML report, scores against truth, terminal text."""
