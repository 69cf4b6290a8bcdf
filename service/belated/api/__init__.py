"""HTTP API: routers, auth dependencies, problem details."""
