"""One module per lensrec subcommand (see lensrec.cli)."""
