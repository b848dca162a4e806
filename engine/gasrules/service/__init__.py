"""Layer 8, service: the HTTP service (ASGI app, handlers, CDS Hooks with its authentication,
request-shape limits, metrics, OpenAPI) and its settings."""
