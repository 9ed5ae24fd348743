"""Camera constant, centre, ellipse and instrumental ring profile from a standard film."""
