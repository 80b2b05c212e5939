"""File formats: every reader and writer of the project."""
