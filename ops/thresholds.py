"""What the control plane says about a model's thresholds before it serves.

``seawall train``, ``seawall retrain`` and ``seawall models promote`` (and
``rollback``) show the cutoffs the deployment's settings give the model (the
same :class:`worker.routing.Router` the workers build) and warn when a
threshold sits at its probability floor, or when the model's held-out ham is
too few to measure a false-positive-rate target.  The warnings go to stderr,
one line each, so that ``--json`` output stays one object.
"""
from __future__ import annotations

import sys

from worker.routing import Router


def model_router(model, settings) -> Router:
    """The router a worker with ``settings`` (``Config.worker``) builds for ``model``."""
    return Router.for_model(model, settings)


def describe(router: Router) -> str:
    cutoffs = router.cutoffs("")
    return f"hold {cutoffs.hold:.4f}  reject {cutoffs.reject:.4f}"


def print_warnings(warnings: list[str], *, op: str, stream=None) -> None:
    stream = sys.stderr if stream is None else stream
    for line in warnings:
        print(f"{op}: warning: {line}", file=stream)
