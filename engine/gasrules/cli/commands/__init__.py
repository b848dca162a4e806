"""One module per gasrules command; each exposes a typer app named `app`."""
