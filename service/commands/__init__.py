"""CLI subcommands. Each module defines ``register(subparsers)``; ``service.cli`` lists them."""
