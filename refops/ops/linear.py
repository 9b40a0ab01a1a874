"""Oracles of the linear family (being written)."""
__all__: list[str] = []
