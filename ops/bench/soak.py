"""`seawall bench soak` (being built; see its issue)."""
from __future__ import annotations


def register(sub) -> None:
    parser = sub.add_parser("soak", help="(being built)")
    parser.set_defaults(func=lambda args: print("seawall bench soak: not built yet") or 1)
