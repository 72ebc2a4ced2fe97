"""One module per ``buttress`` subcommand (``HELP``, ``add_arguments``, ``run``)."""
