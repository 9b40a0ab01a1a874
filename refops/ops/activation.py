"""Oracles of the activation family (being written)."""
__all__: list[str] = []
