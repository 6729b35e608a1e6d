"""Errors castgrid reports to its users.

The tree::

    CastgridError             anything castgrid reports as a user-facing problem (exit code 2)
    ├── ConfigError           the YAML config is malformed or names something that does not exist
    ├── DataError             a dataset file is missing, unreadable or does not fit the config
    ├── PluginError           a plugin forecaster cannot be imported or breaks the protocol
    └── PathError             a folder or file castgrid must write (results, cache) cannot be
                              written: no permission, a file where a folder should be, ...

The command line also reports an ``OSError`` about a path of the user's machine (permission
denied, read-only file system, disk full, a folder where a file should be) as one line naming
the path, exit code 2: it is the user's environment, not a castgrid bug.

Every message is one line that names the file, then the field or column, then what was
expected and what was found, for example::

    configs/shop.yaml: windows.train: expected a count >= 1 or a share like "50%", got "half"
"""

from __future__ import annotations


class CastgridError(Exception):
    """Base of every user-facing castgrid error; the command line turns it into exit code 2."""


class ConfigError(CastgridError):
    """The config file is malformed, has unknown keys or values out of range."""


class DataError(CastgridError):
    """A dataset cannot be read or does not match what the config says about it."""


class PluginError(CastgridError):
    """A plugin forecaster cannot be imported, built, or does not honour the protocol."""


class PathError(CastgridError):
    """A folder or file castgrid must create or write cannot be used as it is."""
