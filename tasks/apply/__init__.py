"""Applying vectors: the category lookup with its unknown-category rule, the batch job, exports."""
