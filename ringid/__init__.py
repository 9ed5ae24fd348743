"""ringid: batch phase identification for electron diffraction ring patterns.

Each stage lives in its own module (see DEVELOPERS.md). This package file stays
import-light so that cheap workflow jobs start fast.
"""

__version__ = "0.1.0"
