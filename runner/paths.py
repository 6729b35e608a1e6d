"""Where a file named in a config is: the one rule the run and the up-to-date check share."""

from __future__ import annotations

from pathlib import Path


def config_relative(path: str | Path, config_folder: str | Path) -> Path:
    """``path`` as a config writes it: ``~`` expanded, a relative path taken from the config's
    folder (not from where castgrid runs), so a config and its data can move together.

    >>> config_relative("data/sales.csv", "configs")
    PosixPath('configs/data/sales.csv')
    """
    p = Path(path).expanduser()
    return p if p.is_absolute() else Path(config_folder) / p
