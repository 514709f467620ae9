"""Seawall's laboratory: invented data and the demo, apart from the product's control plane.

The invented forum (``scenario``), its three neighbouring communities
(``communities``), the board of recurring formats and campaigns (``board``), and
``seawall demo`` with its report (``demo``, ``demo_report``).  Benchmarks and
tests use them; nothing in the serving path imports them.
"""
