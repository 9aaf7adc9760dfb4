"""The one exception tree of the agent.

::

    AgentError
     ├── ConfigError              bad config file: names file, dotted key, value, what is allowed
     │                            (start-up stops with exit code 2; a reload keeps the old config)
     ├── InputError               a recording or request that cannot be used (file named, problem stated)
     │    └── RequestError        a remote request over MQTT that is malformed or not allowed
     ├── SourceError              acquisition trouble
     │    ├── SourceUnavailable   cannot open the device/port/file → reopen with back-off
     │    └── SourceStalled       no data within the timeout → close, reopen, count
     ├── StoreError               disk full / unwritable → count, report in health, keep monitoring
     │    └── IncompatibleStateFile  a stored file of an unknown format version → set aside, start afresh
     ├── PublishError             broker refuses our configuration (auth, TLS) → count, report
     └── MissingExtra             an optional part is not installed (e.g. matplotlib for reports)

Pure computation raises only ``ValueError``/``TypeError`` for impossible
arguments, as numpy and scipy do. The daemon does not catch those: a bug
stops the process and the service manager restarts it. Data-quality problems
are values (quality verdicts), not exceptions.
"""

from __future__ import annotations


class AgentError(Exception):
    """Root of every error the agent raises on purpose."""


class ConfigError(AgentError):
    """The configuration is invalid. ``problems`` lists every problem found."""

    def __init__(self, path: str, problems: list[str] | tuple[str, ...]):
        self.path = str(path)
        self.problems = tuple(problems)
        lines = "\n".join(f"  {p}" for p in self.problems)
        super().__init__(f"invalid configuration {self.path}:\n{lines}")


class InputError(AgentError):
    """A recording or other input that cannot be used as it is."""


class RequestError(InputError):
    """A remote request that is malformed, oversized, unknown or not allowed."""

    def __init__(self, code: str, message: str):
        self.code = code
        super().__init__(f"{code}: {message}")


class SourceError(AgentError):
    """Acquisition trouble."""


class SourceUnavailable(SourceError):
    """The source cannot be opened (device missing, permission, port gone)."""


class SourceStalled(SourceError):
    """The source delivered no data within its timeout."""


class StoreError(AgentError):
    """The state directory cannot be written (disk full, read-only, permissions)."""


class IncompatibleStateFile(StoreError):
    """A stored file has an unknown format version or is unreadable."""


class PublishError(AgentError):
    """The broker refused our configuration (authentication, TLS)."""


class MissingExtra(AgentError):
    """An optional dependency is not installed; the message names the pip extra that brings it."""
