"""The moderators' console in the browser: review queue, decisions, live overview.

Control plane: it reads the hold queue and writes decisions through the same
worker-layer helpers as the CLI (:mod:`worker.holdqueue`,
:mod:`worker.decisions`).  The web stack (Starlette, Jinja2, uvicorn) is
imported only by ``seawall console`` and the demo's ``--console``.
"""
