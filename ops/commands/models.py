"""`seawall models` (being built; see its issue)."""
from __future__ import annotations


def register(sub) -> None:
    parser = sub.add_parser("models", help="(being built)")
    parser.set_defaults(func=lambda args: print("seawall models: not built yet") or 1)
