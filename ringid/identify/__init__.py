"""Phase identification against the library and its decoys."""
