"""Layer 1, core: the error types and every code table, the compiled-rulebook model with its outcome
constants, units, where the shipped data lies, the version. Imports nothing else of gasrules."""
