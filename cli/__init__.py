"""Command-line layer of ntrans: a thin shell over the library API."""
