"""An argparse parser whose errors are one line for the caller to print, not a usage dump."""

from __future__ import annotations

import argparse

__all__ = ["ArgError", "DefaultsHelpFormatter", "OneLineParser", "check_out_folder"]


class DefaultsHelpFormatter(argparse.ArgumentDefaultsHelpFormatter):
    """Help that states every option's default: ``(default: X)`` is appended unless the help
    text already says its default; an on/off flag says ``(default: off)``. Options whose
    default is None must spell their default out in their help."""

    def _get_help_string(self, action):
        text = action.help or ""
        if "default" in text.lower() or action.default is argparse.SUPPRESS:
            return text
        if action.option_strings and action.nargs == 0 and action.default is False:
            return f"{text} (default: off)"
        if action.default is None:
            return text
        return f"{text} (default: %(default)s)"


class ArgError(Exception):
    """A command-line argument error (the message is the one line to print)."""


def check_out_folder(out, name: str) -> None:
    """Refuse, before any work, an output folder ``out`` that cannot be made or written
    (:func:`simfield.resources.check_writable_folder`), naming it as the user gave it
    (``name``: the option, or what the default is)."""
    from .errors import ConfigError
    from .resources import check_writable_folder

    try:
        check_writable_folder(name, out)
    except ConfigError as exc:
        raise ArgError(f"{name}: {str(out)!r} {exc.allowed}") from None


class OneLineParser(argparse.ArgumentParser):
    """ArgumentParser raising :class:`ArgError` instead of printing usage and exiting."""

    def error(self, message):
        raise ArgError(message)
