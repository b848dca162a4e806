"""Layer 3, evaluation: read a case against a compiled rulebook, run its generated function, assemble
the result contract with its trace, and render results and problems as text."""
