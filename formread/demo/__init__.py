"""The invented demo scenario: monthly water-meter cards of a fictional allotment cooperative.

``make_demo`` prints blank cards (``card``), writes MNIST test-part digits on them
(``fill``, ``values``), simulates an office scanner (``scan``) and saves the scans with
their ground truth.  All names and values are invented.
"""

from .make import LAYOUT_NAME, TRUTH_NAME, demo_layout_path, make_demo

__all__ = ["make_demo", "demo_layout_path", "TRUTH_NAME", "LAYOUT_NAME"]
