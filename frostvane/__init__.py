"""The ``frostvane`` command line: one module (:mod:`frostvane.cli`) over the ``detector`` and ``training`` APIs."""

__all__ = ["cli"]
