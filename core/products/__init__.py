"""Products of a run: its layers, files and hand-off documents."""
