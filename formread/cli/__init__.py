"""Command-line edge: parses options, calls one library function, renders. Nothing imports cli."""
