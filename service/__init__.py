"""nightbank's service layer: HTTP API, registry, jobs, CLI and client. Imports ``models``."""
