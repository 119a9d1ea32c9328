"""BAO template fitting: likelihood, sampling and summaries."""
