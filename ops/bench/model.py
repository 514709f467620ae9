"""`seawall bench model` (being built; see its issue)."""
from __future__ import annotations


def register(sub) -> None:
    parser = sub.add_parser("model", help="(being built)")
    parser.set_defaults(func=lambda args: print("seawall bench model: not built yet") or 1)
