"""The evidence layer: seals, their verification, and the continual-learning record."""
