"""The `bandwatch` command and its subcommands, one module each."""
