"""Oracles of the softmax family (being written)."""
__all__: list[str] = []
