"""Implementations of the command-line commands; ``monitor.cli`` parses and dispatches to them."""
