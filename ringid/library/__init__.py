"""The phase library: CIF files to kinematic electron ring lists, and the library's files."""
