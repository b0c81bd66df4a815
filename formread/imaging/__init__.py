"""Pages in, digits out: load, binarize, register (which deskews), cut fields, segment. Never imports nn."""
