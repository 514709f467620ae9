"""`seawall score` (being built; see its issue)."""
from __future__ import annotations


def register(sub) -> None:
    parser = sub.add_parser("score", help="(being built)")
    parser.set_defaults(func=lambda args: print("seawall score: not built yet") or 1)
