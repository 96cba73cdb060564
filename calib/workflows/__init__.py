"""Workflows: the units of work the CLI and HTTP layers call; they own the transactions."""
