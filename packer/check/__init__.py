"""The regression check: a bundle against its float original (agreement, accuracy, drift bound, latency),
the verdict against thresholds, and its JSON, Markdown and JUnit reports."""
