"""The command line (``inspector COMMAND``): :mod:`.main` builds the parser and maps errors to
exit codes; every other module here is one command with a ``register(subparsers)`` function."""
