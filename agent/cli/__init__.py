"""Command-line interface: ``halfcycle <command>``."""
