"""`seawall train` (being built; see its issue)."""
from __future__ import annotations


def register(sub) -> None:
    parser = sub.add_parser("train", help="(being built)")
    parser.set_defaults(func=lambda args: print("seawall train: not built yet") or 1)
