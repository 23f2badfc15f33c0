"""One exception root for the whole gateway.

Layers raise these; only the fs edge (gateway.fs) turns them into errno
values, and only the CLI turns them into exit codes and messages. The OS
error that caused a failure travels as ``__cause__``.
"""
from __future__ import annotations


class ShoalError(Exception):
    """Root of every error the gateway raises on purpose."""


class ConfigError(ShoalError):
    """The pool configuration is malformed or contradictory.

    The message names the file, the key and what would fix it.
    """

    def __init__(self, path: str, key: str, problem: str, fix: str | None = None):
        self.path, self.key, self.problem, self.fix = path, key, problem, fix
        msg = f"{path}: {key}: {problem}"
        if fix:
            msg += f" (fix: {fix})"
        super().__init__(msg)


class StoreError(ShoalError):
    """Something is wrong with one store; only the shards sent to it fail."""

    def __init__(self, store: str, problem: str):
        self.store, self.problem = store, problem
        super().__init__(f"store {store}: {problem}")


class StoreUnavailable(StoreError):
    """The store is missing, unlabelled, unreadable or failing I/O."""


class StoreForeign(StoreUnavailable):
    """The store carries another pool's label; it is never written."""


class StoreUnlabelled(StoreUnavailable):
    """The directory has no label: most often a disk that is not mounted."""


class StoreStalled(StoreUnavailable):
    """An operation passed its deadline (a hung remote mount, say)."""


class StoreFull(StoreError):
    """The store answered ENOSPC."""


class ShardError(ShoalError):
    """A shard file could not be used."""


class ShardMissing(ShardError):
    """The shard file is not on its store."""


class ShardCorrupt(ShardError):
    """The shard file is truncated, corrupt, hostile or from elsewhere."""


class QuorumError(ShoalError):
    """Fewer than w stores accepted a stripe, so the commit was refused.

    The file's previously committed content is untouched.
    """


class StripeLost(ShoalError):
    """Fewer than k valid shards of a stripe could be read.

    Reads fail rather than return wrong bytes.
    """


class PoolUnavailable(ShoalError):
    """Fewer than k stores are usable: the pool cannot serve reads."""


class ReadOnly(ShoalError):
    """The pool is read-only (fewer than w usable stores)."""


class CatalogError(ShoalError):
    """The catalog is missing, corrupt, from another pool or too new."""


# Namespace errors: the POSIX meaning is the whole point, so they are named
# after it; gateway.fs maps each to its errno.
class NamespaceError(ShoalError):
    pass


class NotFound(NamespaceError):
    pass


class Exists(NamespaceError):
    pass


class NotEmpty(NamespaceError):
    pass


class NotADirectory(NamespaceError):
    pass


class IsADirectory(NamespaceError):
    pass


class NameTooLong(NamespaceError):
    pass


class InvalidArgument(NamespaceError):
    pass


class NoAttribute(NamespaceError):
    pass


class NoSpace(NamespaceError):
    pass


class ControlError(ShoalError):
    """The daemon's control socket refused or could not be reached."""
