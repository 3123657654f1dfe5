"""An argparse parser whose errors are one line for the caller to print, not a usage dump."""

from __future__ import annotations

import argparse

__all__ = ["ArgError", "OneLineParser"]


class ArgError(Exception):
    """A command-line argument error (the message is the one line to print)."""


class OneLineParser(argparse.ArgumentParser):
    """ArgumentParser raising :class:`ArgError` instead of printing usage and exiting."""

    def error(self, message):
        raise ArgError(message)
