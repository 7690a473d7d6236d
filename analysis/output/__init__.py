"""Output: the exported HTML report."""
