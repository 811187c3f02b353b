"""Post-processing of released values: non-negative, consistent, unbiased estimates and their intervals."""
