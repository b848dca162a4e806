"""Exit codes of every gasrules command (documented in README and DEVELOPERS.md)."""

OK = 0  # interpreted or partial; a command that succeeded
FAILED = 1  # a check failed: verify failures, unexpected impact transitions, diff without version bump...
USAGE = 2  # bad command line (typer's own code)
INCONSISTENT = 3  # interpret: pH, PCO2 and HCO3 disagree; nothing was classified
REJECTED = 4  # interpret: the input was rejected (errors name each field)
BROKEN_RULEBOOK = 5  # the rulebook failed to load, validate or compile
REFUSED = 6  # strict mode: the active rulebook does not match an approved release
