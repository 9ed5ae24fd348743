"""What the rings say about the sample: crystallite size, crystallinity, ring character."""
