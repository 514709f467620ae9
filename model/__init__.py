"""Seawall's learning core: pure numpy/scipy, no Redis, no network, no global state."""
