"""Readers and writers: files in, xarray and numpy out, and back. Nothing here knows geophysics."""
