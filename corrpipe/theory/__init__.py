"""Linear theory and BAO templates."""
