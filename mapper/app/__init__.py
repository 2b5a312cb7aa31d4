"""Application layer: the jobs behind the commands and the command line (the only typer user)."""
