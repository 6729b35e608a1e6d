"""The ``run``, ``check`` and ``schema`` subcommands."""
