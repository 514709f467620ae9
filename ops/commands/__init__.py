"""One module per ``seawall`` subcommand; each exposes ``register(subparsers)``."""
