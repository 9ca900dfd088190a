"""Zone and lot state between the store and the model: ordering, dedup, gaps, checkpoints."""
