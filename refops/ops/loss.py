"""Oracles of the loss family (being written)."""
__all__: list[str] = []
