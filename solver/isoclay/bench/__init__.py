"""`isoclay bench`: timings and quality figures, each beside a reference measured in the same run."""
