"""Pages in, digits out: load, binarize, deskew, register, cut fields, segment. Never imports nn."""
