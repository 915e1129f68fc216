"""The regression check: a bundle against its float original (agreement, accuracy, drift bound, latency),
the verdict against thresholds, and its JSON, Markdown and JUnit reports."""

BOOTSTRAP_SEED = 20240617  # fixed: the same inputs always give the same bootstrap interval
