"""Outputs of a fit: files (summary.json, CSV tables) and the self-contained HTML report."""
