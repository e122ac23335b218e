"""Commands of ``infer`` that live in modules of their own (every module of this folder whose name does not start with "_"; `infer.cli.COMMAND_MODULES` lists them).

Each module ``infer.commands.NAME`` defines ``register(sub)`` — it adds the sub-parser ``NAME`` to the
argparse sub-parsers ``sub`` and sets ``func`` (a function of the parsed arguments returning the exit
status) — and ``MPI = True`` if the command uses the evaluating MPI ranks. The module only parses and
prints; the science is a library function the tests call too. Argument types shared with `infer.cli`:
`integer` (an integer with a lower bound) and `duration` (a wall-time budget).
"""
from __future__ import annotations


def integer(low: int, what: str):
    """An argparse type: an integer >= ``low`` (the message names ``what``)."""
    from infer.cli import _integer
    return _integer(low, what)


def duration(text):
    """An argparse type: a wall-time budget such as 47:30:00, kept as text."""
    from infer.cli import _duration
    return _duration(text)
