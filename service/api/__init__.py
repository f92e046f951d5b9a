"""HTTP API: dependencies, shapes, problem handlers and one router module per resource."""
