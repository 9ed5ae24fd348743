"""Errors, units, the records passed between stages, and atomic file writes."""
