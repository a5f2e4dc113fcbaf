"""One module per ``burstlens`` command; each exposes ``register(subparsers)``."""
