"""`xbench report` (placeholder until its stage lands)."""

import argparse


def add_arguments(parser: argparse.ArgumentParser) -> None:
    pass


def run(args: argparse.Namespace) -> int:
    raise SystemExit("xbench report: not available yet")
