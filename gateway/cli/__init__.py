"""The `shoal` command. Each command group lives in its own module here
and adds its sub-commands through ``register(subparsers)``; each sets
``func(args) -> int`` as the handler. ShoalError becomes a message on
stderr and a non-zero exit status here, in one place."""
from __future__ import annotations

import argparse
import importlib
import logging
import sys

from .. import allocator
from ..errors import ConfigError, ShoalError

# Modules that add sub-commands, in the order `shoal --help` lists them.
COMMAND_MODULES = ("pool", "mount", "plan", "recovery", "heal")

EXIT_ERROR = 1
EXIT_CONFIG = 2


def build_parser() -> argparse.ArgumentParser:
    from .. import __version__

    p = argparse.ArgumentParser(
        prog="shoal",
        description="Shoal: one directory over k-of-n erasure-coded stores. Shoal is not a backup.",
    )
    p.add_argument("--version", action="version", version=f"shoal {__version__}")
    p.add_argument("-v", "--verbose", action="count", default=0, help="more log output on stderr")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMAND_MODULES:
        importlib.import_module(f"{__name__}.{name}").register(sub)
    return p


def _first_shoal_error(group: BaseExceptionGroup) -> BaseException:
    """trio nurseries wrap errors in groups; a group of our own errors is
    reported as its first one. Anything else stays a group (a bug)."""
    leaves = []

    def walk(g):
        for e in g.exceptions:
            walk(e) if isinstance(e, BaseExceptionGroup) else leaves.append(e)

    walk(group)
    if leaves and all(isinstance(e, (ShoalError, KeyboardInterrupt)) for e in leaves):
        return leaves[0]
    return group


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(
        level=logging.DEBUG if args.verbose > 1 else logging.INFO if args.verbose or args.command in ("mount", "demo") else logging.WARNING,
        format="%(asctime)s shoal %(levelname)s %(name)s: %(message)s",
        stream=sys.stderr,
    )
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)
        return EXIT_CONFIG
    allocator.tune()  # shard-sized buffers from the heap, not fresh mmaps (gateway.allocator)
    try:
        try:
            return int(args.func(args) or 0)
        except BaseExceptionGroup as group:
            raise _first_shoal_error(group) from None
    except ConfigError as e:
        print(f"shoal: config error: {e}", file=sys.stderr)
        return EXIT_CONFIG
    except ShoalError as e:
        print(f"shoal: {e}", file=sys.stderr)
        return EXIT_ERROR
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
