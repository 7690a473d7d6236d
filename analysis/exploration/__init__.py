"""Exploration: per-subject lines, detrending, within-subject pairs, the semivariogram, lag correlations, group and follow-up summaries."""
