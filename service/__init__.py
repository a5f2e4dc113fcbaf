"""burstlens service: HTTP API, job store, workers, reports and the ``burstlens`` CLI."""
