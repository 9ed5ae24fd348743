"""The image stage: load a pattern, mask it, find its centre and ellipse, integrate it with pyFAI."""
