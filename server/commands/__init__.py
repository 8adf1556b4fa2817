"""One module per ``pellucid`` subcommand; each exposes ``register(subparsers)``."""
