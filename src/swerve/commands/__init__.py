"""One module per ``swerve`` subcommand: ``add_parser(subparsers)`` registers the parser and
sets ``func(args) -> int``. Kept thin: parse, call library functions, print."""
