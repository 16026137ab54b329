"""The ``frostvane`` command (placeholder until the subcommands land)."""

import argparse


def main(argv=None):
    parser = argparse.ArgumentParser(prog="frostvane")
    parser.add_subparsers(dest="command", required=True)
    parser.parse_args(argv)
    return 0
