"""Oracles of the pool family (being written)."""
__all__: list[str] = []
