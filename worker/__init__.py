"""Seawall's data plane: Redis Streams in, verdicts out."""
