"""Lots: batches of pallets of one product, each with its own crystal population."""
