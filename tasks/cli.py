"""Command line of lightledger."""
import sys


def main(argv=None):
    print("lightledger: not yet")
    return 0
