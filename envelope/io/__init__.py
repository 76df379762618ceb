"""I/O layer: all knowledge of file formats lives here."""
