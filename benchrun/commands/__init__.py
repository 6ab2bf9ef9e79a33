"""Sub-commands of the ``benchrun`` command line, one module each (see :mod:`benchrun.cli`)."""
