"""`seawall watch` (being built; see its issue)."""
from __future__ import annotations


def register(sub) -> None:
    parser = sub.add_parser("watch", help="(being built)")
    parser.set_defaults(func=lambda args: print("seawall watch: not built yet") or 1)
