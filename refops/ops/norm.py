"""Oracles of the norm family (being written)."""
__all__: list[str] = []
