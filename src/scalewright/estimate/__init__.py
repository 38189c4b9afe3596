"""Estimation: numbers only, no I/O.  One module per method (see DEVELOPERS.md)."""
