"""The 1D profile: line shapes, background, ring detection and fitting."""
