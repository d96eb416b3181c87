"""Command-line interface: thin wrappers that parse arguments, call the layers below and print."""
