"""formread: read handwritten numbers on scanned paper forms, on an ordinary CPU."""

__version__ = "0.1.0"
