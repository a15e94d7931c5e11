"""The console script ``dlco-bridge``: the composition root (shell).

Owns: ``main`` -- the settings object for the run through ``bridge.config`` (configuration file,
environment, then the flags ``parser`` defines), the tables, and the command: ``files`` (check,
convert, demo, show, schema, map check, audit) or ``service`` (watch, status, resend, prune,
stand-in) or ``reconcile``. Exit 0 when every input was read, 2 when one could not be (one line per
bad input on stderr), 1 on a usage or setup error; ``reconcile`` says 0 complete, 1 gaps, 2 could not run.
"""

from __future__ import annotations

import argparse
import gc
import io
import os
import sys
from collections.abc import Sequence

from bridge.cli.files import cmd_audit, cmd_check, cmd_convert, cmd_demo, cmd_map, cmd_schema, cmd_show, convert_files
from bridge.cli.parser import (
    EXIT_BAD_INPUT,
    EXIT_BROKEN_PIPE,
    EXIT_INTERRUPTED,
    EXIT_OK,
    EXIT_SETUP,
    PRIVATE_UMASK,
    build_parser,
    settings_of,
)
from bridge.cli.reconcile import EXIT_COULD_NOT_RUN, cmd_reconcile
from bridge.cli.service import cmd_prune, cmd_resend, cmd_stand_in, cmd_status, cmd_watch
from bridge.config import CONFIG_ENV, SAMPLE_CONFIG
from bridge.errors import BridgeError, ConfigError
from bridge.tables.files import load_tables

__all__ = ["EXIT_BAD_INPUT", "EXIT_OK", "EXIT_SETUP", "build_parser", "convert_files", "main"]


COMMANDS = {
    "stand-in": cmd_stand_in,
    "prune": cmd_prune,
    "watch": cmd_watch,
    "status": cmd_status,
    "resend": cmd_resend,
    "check": cmd_check,
    "convert": cmd_convert,
    "demo": cmd_demo,
    "show": cmd_show,
    "schema": cmd_schema,
    "audit": cmd_audit,
    "map": cmd_map,
    "reconcile": cmd_reconcile,
}
_NEEDS_CONFIG = ("watch", "status", "resend", "prune")


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    umask = os.umask(PRIVATE_UMASK)  # files and folders the run creates: owner only (README, "Patient data")
    try:
        code = _run(args)
        sys.stdout.flush()  # a reader that went away is met here, not at interpreter exit
        return code
    except BrokenPipeError:
        # The reader of the output stopped early (``| head``): stop quietly, as a program stopped
        # by SIGPIPE does, and keep the interpreter from complaining when it flushes at exit.
        _silence_stdout()
        return EXIT_BROKEN_PIPE
    except KeyboardInterrupt:
        print("dlco-bridge: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    finally:
        os.umask(umask)


def _run(args: argparse.Namespace) -> int:
    try:
        settings = settings_of(args, os.environ)
        if args.command in _NEEDS_CONFIG and settings.source.startswith("("):
            raise ConfigError("--config", f"a configuration file (--config FILE or ${CONFIG_ENV}; see {SAMPLE_CONFIG})")
        tables = load_tables(traditional_per_si=settings.traditional_per_si)
        # The tables and settings live as long as the command: frozen, the garbage collector
        # stops rescanning their tens of thousands of objects at every collection.
        gc.freeze()
        try:
            return COMMANDS[args.command](args, settings, tables)
        finally:
            gc.unfreeze()
    except BridgeError as exc:
        print(f"dlco-bridge: {exc}", file=sys.stderr)
        # reconcile's exit codes say what it concluded: 2 when the check itself could not run
        return EXIT_COULD_NOT_RUN if args.command == "reconcile" else EXIT_SETUP
    except BrokenPipeError:
        raise
    except OSError as exc:  # the file system or the network refused something: not a defect, one line
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"dlco-bridge: {where}{exc.strerror or exc}", file=sys.stderr)
        return EXIT_COULD_NOT_RUN if args.command == "reconcile" else EXIT_SETUP


def _silence_stdout() -> None:
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, io.UnsupportedOperation):  # no file descriptor (tests capture output)
        pass
