"""The report and the printed sheets of a run."""
