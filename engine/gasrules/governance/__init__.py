"""Layer 6, governance: change control. Semantic diff, impact replay, probes, the review document,
releases and their registry, suspensions, site settings, the governed runtime, shadow runs, and
the hash-chained decision log with its audit."""
