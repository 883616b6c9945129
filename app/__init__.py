"""expertloop: expert relabelling rounds for imitation-learned robot policies."""
