"""The package version (one place; the facade, the compiled-rulebook cache and the decision log read it)."""

__version__ = "0.1.0"
