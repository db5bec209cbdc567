"""Subcommands of the ``cmbtools`` tool, one module each (see :mod:`cmbtools.cli`)."""
