"""Oracles of the conv family (being written)."""
__all__: list[str] = []
