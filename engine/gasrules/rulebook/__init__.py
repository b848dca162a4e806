"""Layer 2, rulebook: load (YAML with line numbers), validate (JSON Schema and names), overlay a
site on its base, check expressions (the only simpleeval user), compile, hash, generate the
evaluation function, and cache the result (build: the pipeline's entry)."""
