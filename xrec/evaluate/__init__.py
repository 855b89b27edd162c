"""Offline evaluation: full-ranking metrics, scorecards, paired comparisons."""
