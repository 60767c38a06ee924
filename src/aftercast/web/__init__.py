"""The HTTP side of the daemon: push ingestion, read API, status pages, health and metrics.

`app.create_app` builds the FastAPI application; `settings` holds the config sections of the
running service and imports no web framework, so reading the config stays light.
"""
